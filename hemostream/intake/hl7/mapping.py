"""HL7 v2 ORU^R01 (IHE PCD-01) -> the wire format's ``obs`` messages, fed to the same core.

Parsing uses the ``hl7`` package. The output of :func:`map_message` is what the MQTT JSON
path hands to :meth:`hemostream.core.processor.Processor.feed`: a topic
``hemo/<unit>/<bed>/obs`` and a payload dict in wire format version 1, so validation, unit
conversion, derivation, rules and storage are the same code. :func:`feed_hl7` does the
feeding and records what the HL7 layer itself had to reject.

Identity: MSH-10 (message control id) becomes the wire ``seq`` (digits as the number they
spell, anything else a 48-bit digest above 2^62), the device comes from OBX-18 (else MSH-3),
and the message ``time`` from OBR-7 (else MSH-7), so a resent message is the same
(device, seq, time) and dropped as a duplicate.

Size: one segment reader per HL7 field group read (MSH, PV1, OBR, OBX) with its reject
reasons; split by segment it would scatter one message's mapping over several files.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from typing import Any

import hl7

from ...core.processor import Processor
from .config import Hl7Config, location_key
from .terms import Terms, load_terms

_NAME = re.compile(r"^[A-Za-z0-9_-]{1,32}$")
_NM = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)$")
_DTM = re.compile(r"^(\d{4})(\d{2})(\d{2})(\d{2})(\d{2})(\d{2})?(\.\d{1,4})?([+-]\d{4})?$")
_HASHED_SEQ = 1 << 62

#: ERR-3 error codes, HL7 table 0357 (code numbers from memory)
ERROR_CODES = {"unreadable": ("100", "Segment sequence error"),
               "missing_field": ("101", "Required field missing"),
               "bad_field": ("102", "Data type error"),
               "unknown_param": ("103", "Table value not found"),
               "bad_unit": ("103", "Table value not found"),
               "unknown_location": ("103", "Table value not found"),
               "unsupported_message": ("200", "Unsupported message type"),
               "too_large": ("100", "Segment sequence error")}


class Hl7Error(Exception):
    """The whole message is unusable: ``code`` is the MSA-1 answer (AR or AE)."""

    def __init__(self, code: str, category: str, reason: str) -> None:
        super().__init__(reason)
        self.code = code
        self.category = category
        self.reason = reason


@dataclass
class ObsReject:
    obx: str
    category: str
    reason: str
    device: str | None = None


@dataclass
class Mapped:
    """One HL7 message as wire-format messages, plus what the HL7 layer rejected."""

    control_id: str
    topic: str
    #: (payload, OBX set id of each obs) per device, in first-seen order
    messages: list[tuple[dict[str, Any], list[str]]] = field(default_factory=list)
    rejects: list[ObsReject] = field(default_factory=list)
    skipped_structure: int = 0
    #: MSH-7 as epoch seconds (the arrival time a file replay uses), when present
    sent: float | None = None


def control_id_to_seq(control_id: str) -> int:
    """MSH-10 -> the wire format's non-negative integer ``seq``.

    Digits (below 2^62) are the number they spell; any other control id is a 48-bit digest
    placed above 2^62, so the two kinds never meet.

    >>> control_id_to_seq("000123")
    123
    >>> control_id_to_seq("A-17") >= 2 ** 62
    True
    """
    if control_id.isdigit() and control_id.isascii() and int(control_id) < _HASHED_SEQ:
        return int(control_id)
    digest = hashlib.sha256(control_id.encode("utf-8")).digest()
    return _HASHED_SEQ + int.from_bytes(digest[:6], "big")


def parse_dtm(text: str, assume_offset: str | None = None) -> datetime:
    """An HL7 DTM (``YYYYMMDDHHMM[SS[.S[S[S[S]]]]][+/-ZZZZ]``) as an aware datetime.

    Minute precision at least; an explicit offset unless ``assume_offset`` is given.

    >>> parse_dtm("20261201081500.25+0100").isoformat()
    '2026-12-01T08:15:00.250000+01:00'
    """
    m = _DTM.match(text)
    if not m:
        raise ValueError(f"{text[:40]!r} is not an HL7 date/time with minute precision or "
                         "finer (YYYYMMDDHHMM[SS[.SSSS]]+ZZZZ)")
    y, mo, d, h, mi, s, frac, off = m.groups()
    if off is None:
        if assume_offset is None:
            raise ValueError(f"{text[:40]!r} has no UTC offset (+ZZZZ); send one, or set "
                             "[intake.hl7] assume_utc_offset")
        off = assume_offset
    sign = 1 if off[0] == "+" else -1
    oh, om = int(off[1:3]), int(off[3:5])
    if oh > 14 or om > 59:
        raise ValueError(f"{text[:40]!r}: offset {off} is out of range")
    tz = timezone(sign * timedelta(hours=oh, minutes=om))
    try:
        return datetime(int(y), int(mo), int(d), int(h), int(mi), int(s or 0),
                        round(float(frac or 0) * 1e6) if frac else 0, tzinfo=tz)
    except ValueError as e:
        raise ValueError(f"{text[:40]!r} is not a valid date/time ({e})") from None


def format_dtm(t: datetime) -> str:
    """An aware datetime as HL7 DTM in UTC, millisecond precision.

    >>> format_dtm(datetime(2026, 12, 1, 8, 15, 0, 250000, tzinfo=timezone.utc))
    '20261201081500.250+0000'
    """
    u = t.astimezone(timezone.utc)
    return u.strftime("%Y%m%d%H%M%S") + f".{u.microsecond // 1000:03d}+0000"


def rfc3339(t: datetime) -> str:
    s = t.isoformat(timespec="microseconds")
    return s.replace("+00:00", "Z")


def normalise(raw: bytes | str) -> str:
    """Text of one message with MLLP frame bytes removed and segments ended by CR."""
    if isinstance(raw, bytes):
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            text = raw.decode("latin-1")
    else:
        text = raw
    text = text.replace("\x0b", "").replace("\x1c", "")
    lines = [ln for ln in re.split(r"\r\n|\r|\n", text) if ln.strip()]
    return "\r".join(lines)


_PRIVATE = ("PID", "NK1", "PD1")


def redact(text: str) -> str:
    """The message without patient identification: PID, NK1 and PD1 keep only their set id,
    PV1 only PV1-1 to PV1-3 (the location). For anything stored or shown by default."""
    sep = text[3] if len(text) > 3 and text.startswith("MSH") else "|"
    out = []
    for seg in text.split("\r"):
        name = seg[:3]
        if name in _PRIVATE:
            f = seg.split(sep)
            seg = sep.join(f[:2]) + (sep + "[removed]" if len(f) > 2 else "")
        elif name == "PV1":
            f = seg.split(sep)
            if len(f) > 4:
                seg = sep.join(f[:4]) + sep + "[removed]"
        out.append(seg)
    return "\r".join(out)


class _Msg:
    """Field access by HL7 numbering that answers "" for anything absent."""

    def __init__(self, msg: hl7.Message) -> None:
        self.msg = msg
        seps = msg.separators          # segment, field, repetition, component, subcomponent
        self.rep = seps[2] if len(seps) > 2 else "~"
        self.comp = seps[3] if len(seps) > 3 else "^"

    def field(self, seg, n: int) -> str:
        try:
            return str(seg(n))
        except (IndexError, KeyError, TypeError):
            return ""

    def comps(self, seg, n: int) -> list[str]:
        text = self.field(seg, n).split(self.rep)[0]
        return [self.msg.unescape(c) if "\\" in c else c for c in text.split(self.comp)]

    def comp_n(self, seg, n: int, c: int) -> str:
        parts = self.comps(seg, n)
        return parts[c - 1].strip() if len(parts) >= c else ""


def _location(cfg: Hl7Config, pv1_3: str, comps: list[str]) -> tuple[str, str]:
    key = location_key(pv1_3)
    loc = cfg.locations.get(key)
    if loc is not None:
        return loc.unit, loc.bed
    if cfg.locations_from_components and len(comps) >= 3:
        unit, bed = comps[0].strip(), comps[2].strip()
        if _NAME.match(unit) and _NAME.match(bed):
            return unit, bed
    raise Hl7Error("AE", "unknown_location",
                   f"PV1-3: location {key[:80]!r} is not in [intake.hl7.locations]")


def map_message(raw: bytes | str, cfg: Hl7Config, terms: Terms | None = None) -> Mapped:
    """Parse and map one message; raises :class:`Hl7Error` when none of it can be used."""
    terms = terms or load_terms()
    text = normalise(raw)
    if not text.startswith("MSH"):
        raise Hl7Error("AR", "unreadable", "no MSH segment: an HL7 v2 message begins with MSH")
    try:
        msg = hl7.parse(text)
        msh = msg.segment("MSH")
    except Exception as e:  # noqa: BLE001 - the parser's errors are of several kinds
        raise Hl7Error("AR", "unreadable", f"cannot be parsed as HL7 v2 "
                       f"({e.__class__.__name__}: {str(e)[:120]})") from None
    a = _Msg(msg)
    mtype = a.comps(msh, 9)
    kind = "^".join(c for c in mtype[:2])
    if kind != "ORU^R01":
        raise Hl7Error("AR", "unsupported_message",
                       f"MSH-9: message type {kind[:40]!r} is not ORU^R01")
    control_id = a.field(msh, 10).strip()
    if not control_id:
        raise Hl7Error("AR", "missing_field", "MSH-10 (message control id) is empty")
    if len(control_id) > 199:
        raise Hl7Error("AR", "bad_field", "MSH-10 (message control id) is longer than 199 "
                       "characters")
    off = cfg.assume_utc_offset
    sent = None
    msh7 = a.comp_n(msh, 7, 1)
    if msh7:
        try:
            sent_dt = parse_dtm(msh7, off)
            sent = sent_dt.timestamp()
        except ValueError as e:
            raise Hl7Error("AE", "bad_field", f"MSH-7: {e}") from None
    else:
        sent_dt = None
    test = a.comp_n(msh, 11, 1) in cfg.test_processing_ids
    msh_device = a.comp_n(msh, 3, 1) or a.comp_n(msh, 3, 2)

    pv1s = msg.segments("PV1") if _has(msg, "PV1") else []
    if not pv1s:
        raise Hl7Error("AE", "missing_field", "no PV1 segment: the bed comes from PV1-3")
    locs = {location_key(a.field(p, 3)) for p in pv1s}
    if len(locs) > 1:
        raise Hl7Error("AE", "bad_field", "more than one PV1-3 location in one message; "
                       "send one message per bed")
    pv1 = pv1s[0]
    unit, bed = _location(cfg, a.field(pv1, 3), a.comps(pv1, 3))
    mapped = Mapped(control_id=control_id, topic=f"hemo/{unit}/{bed}/obs", sent=sent)

    obr7: datetime | None = None
    first_obr7: datetime | None = None
    groups: dict[str, list[tuple[dict[str, Any], str]]] = {}
    n_obx = 0
    for seg in msg:
        name = str(seg[0]) if len(seg) else ""
        if name == "OBR":
            obr7 = None
            t = a.comp_n(seg, 7, 1)
            if t:
                try:
                    obr7 = parse_dtm(t, off)
                except ValueError as e:
                    raise Hl7Error("AE", "bad_field", f"OBR-7: {e}") from None
                if first_obr7 is None:
                    first_obr7 = obr7
            continue
        if name != "OBX":
            continue
        n_obx += 1
        setid = a.field(seg, 1).strip() or str(n_obx)
        where = f"OBX {setid[:8]}"
        vtype = a.comp_n(seg, 2, 1)
        value = a.field(seg, 5).strip()
        if not vtype and not value:
            mapped.skipped_structure += 1      # an MDS/VMD/channel row of the containment tree
            n_obx -= 1
            continue
        device = a.comp_n(seg, 18, 1) or a.comp_n(seg, 18, 3) or msh_device
        r = _obx(a, seg, where, vtype, value, terms, cfg, test, obr7 or sent_dt, off)
        if isinstance(r, ObsReject):
            r.device = device or None
            mapped.rejects.append(r)
            continue
        if not device:
            mapped.rejects.append(ObsReject(where, "missing_field", f"{where}: no device: "
                                            "OBX-18 and MSH-3 are both empty"))
            continue
        groups.setdefault(device, []).append((r, setid))
    if n_obx == 0:
        raise Hl7Error("AE", "missing_field", "no OBX segment with a value: nothing to store")
    seq = control_id_to_seq(control_id)
    for device, items in groups.items():
        obs = [o for o, _ in items]
        mtime = first_obr7 or sent_dt
        payload: dict[str, Any] = {"v": 1, "device": device, "seq": seq,
                                   "time": rfc3339(mtime) if mtime else
                                   min((o["time"] for o in obs), key=_sort_time),
                                   "obs": obs}
        mapped.messages.append((payload, [s for _, s in items]))
    return mapped


def _sort_time(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


def _has(msg: hl7.Message, name: str) -> bool:
    return any(len(s) and str(s[0]) == name for s in msg)


def _obx(a: _Msg, seg, where: str, vtype: str, value: str, terms: Terms, cfg: Hl7Config,
         test: bool, default_time: datetime | None, off: str | None) -> dict | ObsReject:
    if vtype != "NM":
        return ObsReject(where, "bad_field", f"{where}: OBX-2 value type {vtype[:8]!r} is not "
                         "NM (numeric); only numeric observations are read")
    ident = a.comps(seg, 3)
    code = ident[0].strip() if ident else ""
    ref = ident[1].strip() if len(ident) > 1 else ""
    term, why = terms.lookup("param", code, ref)
    if term is None:
        return ObsReject(where, "unknown_param", f"{where}: unknown MDC term {why[:80]} in "
                         "OBX-3 (not in the intake's table, hemostream/intake/hl7/mdc.csv)")
    if a.rep in value or not _NM.match(value):
        return ObsReject(where, "bad_field", f"{where}: OBX-5 value {value[:40]!r} is not an "
                         "HL7 NM number")
    number = float(value)
    ucomp = a.comps(seg, 6)
    ucode = ucomp[0].strip() if ucomp else ""
    utext = ucomp[1].strip() if len(ucomp) > 1 else ""
    usys = ucomp[2].strip().upper() if len(ucomp) > 2 else ""
    if not ucode and not utext:
        return ObsReject(where, "missing_field", f"{where}: OBX-6 (units) is empty")
    if usys == "UCUM" or (usys not in ("MDC", "ISO+", "")):
        unit = ucode or utext
    else:
        ut, uwhy = terms.lookup("unit", ucode, utext)
        if ut is not None:
            unit = ut.maps_to
        elif usys == "MDC" or ucode.isdigit() or (ucode or utext).startswith("MDC_"):
            return ObsReject(where, "bad_unit", f"{where}: unknown MDC unit term {uwhy[:80]} "
                             "in OBX-6 (not in hemostream/intake/hl7/mdc.csv)")
        else:
            unit = ucode                       # no coding system named: read as UCUM
    rs = a.comp_n(seg, 11, 1)
    if not rs:
        return ObsReject(where, "missing_field", f"{where}: OBX-11 (result status) is empty")
    status = cfg.status_map.get(rs)
    if status is None:
        return ObsReject(where, "bad_field", f"{where}: OBX-11 result status {rs[:4]!r} is not "
                         f"one of {', '.join(cfg.status_map)}")
    if test:
        status = "test"
    t14 = a.comp_n(seg, 14, 1)
    if t14:
        try:
            t = parse_dtm(t14, off)
        except ValueError as e:
            return ObsReject(where, "bad_field", f"{where}: OBX-14 {e}")
    elif default_time is not None:
        t = default_time
    else:
        return ObsReject(where, "missing_field", f"{where}: no measurement time (OBX-14, "
                         "OBR-7 and MSH-7 are empty)")
    o: dict[str, Any] = {"param": term.maps_to, "value": number, "unit": unit,
                         "time": rfc3339(t)}
    if status != "valid":
        o["status"] = status
    return o


# ---------------------------------------------------------------------------- feeding


@dataclass
class Outcome:
    """What became of one HL7 message: the MSA-1 code and a text for MSA-3 / ERR-8."""

    code: str                      # AA, AE or AR
    text: str = ""
    category: str | None = None    # of the first problem
    control_id: str = ""
    stored: int = 0                # observations
    rejected: int = 0
    duplicates: int = 0


def _raw_for_store(text: str, cfg: Hl7Config) -> bytes:
    return (text if cfg.store_patient_ids else redact(text)).encode("utf-8", "replace")


def feed_hl7(proc: Processor, raw: bytes | str, rx: float, cfg: Hl7Config, *,
             source: str = "hl7", terms: Terms | None = None) -> Outcome:
    """Map ``raw`` and feed it to ``proc`` (arrival time ``rx``, epoch seconds).

    Every reject goes into the processor's outputs (table ``rejected``) with a reason naming
    the segment, so it is stored with the rest of the batch. Patient identification is removed
    from the stored bytes unless ``store_patient_ids`` is set; nothing here logs them.
    """
    size = len(raw)
    if size > cfg.max_message_bytes:
        reason = (f"message is {size} bytes; the limit is {cfg.max_message_bytes} bytes "
                  "([intake.hl7] max_message_bytes; not parsed)")
        proc.reject_unreadable(f"hl7/{source}", _raw_for_store(normalise(raw[:4096]), cfg),
                               rx, reason, "too_large")
        return Outcome("AR", reason, "too_large")
    text = normalise(raw)
    try:
        m = map_message(text, cfg, terms)
    except Hl7Error as e:
        topic = f"hl7/{source}"
        proc.reject_unreadable(topic, _raw_for_store(text, cfg), rx, e.reason, e.category)
        return Outcome(e.code, e.reason, e.category, control_id=_scrape_control_id(text),
                       rejected=1)
    stored_raw = _raw_for_store(text, cfg)
    out = proc.out
    first = len(out.rejected)
    seq = control_id_to_seq(m.control_id)
    for r in m.rejects:
        proc.reject_unreadable(m.topic, stored_raw, rx, r.reason, r.category)
        row = proc.out.rejected[-1]
        row["device"] = r.device[:64] if r.device else None
        row["seq"] = seq
    n_obs0 = proc.counters.observations
    dup0 = proc.counters.duplicates
    for payload, setids in m.messages:
        before = len(proc.out.rejected)
        proc.feed(m.topic, payload, rx)
        for row in proc.out.rejected[before:]:      # the core's own rejects of this message
            i = row.get("obs_index")
            if i is not None and 0 <= i < len(setids):
                row["reason"] = f"OBX {setids[i][:8]}: {row['reason']}"
            row["raw"] = stored_raw[: proc.cfg.ingest.stored_raw_bytes]
            row["size"] = len(stored_raw)
    new = proc.out.rejected[first:]
    oc = Outcome("AA", control_id=m.control_id,
                 stored=proc.counters.observations - n_obs0,
                 duplicates=proc.counters.duplicates - dup0, rejected=len(new))
    if new:
        oc.code = "AE"
        oc.category = new[0]["category"]
        more = f" (and {len(new) - 1} more)" if len(new) > 1 else ""
        oc.text = f"{len(new)} rejected: {new[0]['reason']}{more}"[:400]
    else:
        oc.text = (f"{oc.stored} observation(s) stored" if not oc.duplicates else
                   "already received (duplicate); stored before")
    return oc


def _scrape_control_id(text: str) -> str:
    if not text.startswith("MSH") or len(text) < 4:
        return ""
    f = text.split("\r", 1)[0].split(text[3])
    return f[9].strip()[:199] if len(f) > 9 else ""
