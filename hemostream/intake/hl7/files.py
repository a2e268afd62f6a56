"""Files of HL7 v2 messages: reading them (replay) and writing the simulator's ward stream
as IHE PCD-01 ORU^R01 messages.

A file holds messages one after another; each begins with an MSH segment; segments end with
CR, LF or CRLF; MLLP frame bytes (0x0b, 0x1c 0x0d) are ignored, so a capture of an MLLP
stream reads as it is. Batch envelopes (FHS, BHS, BTS, FTS) are skipped.
"""

from __future__ import annotations

import re
import time as _time
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import IO, Any, Iterable, Iterator

from ...core.config import Config
from ...core.processor import Processor
from ...pipeline import make_rules
from ...store import Writer, load_resume, open_engine, rows_of
from .config import Hl7Config
from .mapping import feed_hl7, format_dtm, map_message, Hl7Error
from .mllp import escape
from .terms import Terms, load_terms

_ENVELOPE = ("FHS", "BHS", "BTS", "FTS")


def iter_messages(source: str | Path | bytes | IO[bytes]) -> Iterator[tuple[int, bytes]]:
    """(line number, message bytes with CR-ended segments) for each message of ``source``.

    Text before the first MSH becomes a message of its own (which is then rejected as
    having no MSH), so nothing in a file is silently dropped.
    """
    if isinstance(source, (str, Path)):
        with open(source, "rb") as f:
            data = f.read()
    elif isinstance(source, bytes):
        data = source
    else:
        data = source.read()
    data = data.replace(b"\x0b", b"").replace(b"\x1c", b"")
    cur: list[bytes] = []
    start = 0
    for lineno, line in enumerate(re.split(rb"\r\n|\r|\n", data), 1):
        if not line.strip():
            continue
        if line[:3] in (b"FHS", b"BHS", b"BTS", b"FTS"):
            continue
        if line.startswith(b"MSH") and cur:
            yield start, b"\r".join(cur) + b"\r"
            cur = []
        if not cur:
            start = lineno
        cur.append(line)
    if cur:
        yield start, b"\r".join(cur) + b"\r"


@dataclass
class Hl7ReplaySummary:
    path: str = ""
    db_url: str = ""
    messages: int = 0
    answers: dict[str, int] = field(default_factory=lambda: {"AA": 0, "AE": 0, "AR": 0})
    observations: int = 0
    rejected: dict[str, int] = field(default_factory=dict)
    duplicates: int = 0
    seconds: float = 0.0


def replay_hl7_file(path: str | Path, db_url: str | None = None,
                    config: Config | None = None, hl7_config: Hl7Config | None = None, *,
                    rules: Any = "default") -> Hl7ReplaySummary:
    """Feed every message of ``path`` through the core into ``db_url``.

    The arrival time of a message is its MSH-7 (the file has no other), else its
    measurement time, so a file replays to the same stored results every time.
    """
    cfg = config or Config()
    hcfg = hl7_config or Hl7Config()
    url = db_url or cfg.store.url
    engine = open_engine(url)
    resume = load_resume(engine)
    proc = Processor(cfg, rules=make_rules(cfg) if rules == "default" else rules,
                     publish=False, next_ids=resume.next_ids, known_beds=resume.beds,
                     known_messages=resume.messages)
    writer = Writer(engine, max_batches=4)
    terms = load_terms()
    summary = Hl7ReplaySummary(path=str(path), db_url=url)
    t0 = _time.perf_counter()
    name = Path(path).name
    last_rx: float | None = None
    try:
        for lineno, raw in iter_messages(path):
            summary.messages += 1
            rx = _arrival(raw, hcfg, terms)
            if rx is None:
                rx = last_rx if last_rx is not None else 0.0
            last_rx = rx
            oc = feed_hl7(proc, raw, rx, hcfg, source=f"file/{name[:200]}:{lineno}",
                          terms=terms)
            summary.answers[oc.code] = summary.answers.get(oc.code, 0) + 1
            proc.tick(rx)
            if proc.out.row_count() >= cfg.store.batch_rows:
                writer.submit(rows_of(proc.drain()))
        writer.submit(rows_of(proc.drain()))
        writer.close()
    finally:
        engine.dispose()
    summary.observations = proc.counters.observations
    summary.rejected = dict(sorted(proc.counters.rejected.items()))
    summary.duplicates = proc.counters.duplicates
    summary.seconds = _time.perf_counter() - t0
    return summary


def _arrival(raw: bytes, hcfg: Hl7Config, terms: Terms) -> float | None:
    try:
        m = map_message(raw, hcfg, terms)
    except Hl7Error:
        return None
    if m.sent is not None:
        return m.sent
    times = [datetime.fromisoformat(p["time"].replace("Z", "+00:00")).timestamp()
             for p, _ in m.messages]
    return max(times) if times else None


# ---------------------------------------------------------------------------- writing


def _num(v: float | int) -> str:
    """A number as HL7 NM text (no exponent).

    >>> _num(11.5), _num(84), _num(1e-7)
    ('11.5', '84', '0.0000001')
    """
    if isinstance(v, int) or float(v).is_integer():
        return str(int(v))
    s = repr(float(v))
    if "e" in s or "E" in s:
        s = f"{v:.15f}".rstrip("0").rstrip(".")
    return s


def _dtm(text: str) -> str:
    return format_dtm(datetime.fromisoformat(text.replace("Z", "+00:00")))


def pcd01_message(payload: dict[str, Any], unit: str, bed: str, *, rx: str | None = None,
                  hl7_config: Hl7Config | None = None, terms: Terms | None = None,
                  sending_facility: str = "", receiving_app: str = "hemostream") -> str:
    """One wire-format ``obs`` payload as an ORU^R01 (IHE PCD-01 structure, HL7 v2.6).

    MSH-10 = ``seq``, MSH-3 and OBX-18 = ``device``, OBR-7 = the message ``time``,
    OBX-14 = each observation's time, PV1-3 from the reverse of the location map (or
    ``unit^^bed``). No PID contents are written (an empty PID keeps the structure).
    """
    terms = terms or load_terms()
    hcfg = hl7_config or Hl7Config()
    loc = hcfg.reverse_locations().get((unit, bed)) or f"{escape(unit)}^^{escape(bed)}"
    dev = escape(str(payload["device"]))
    t_msg = _dtm(payload["time"])
    sent = _dtm(rx) if rx else t_msg
    segs = [
        f"MSH|^~\\&|{dev}|{escape(sending_facility)}|{escape(receiving_app)}||{sent}||"
        f"ORU^R01^ORU_R01|{int(payload['seq'])}|P|2.6||||||UNICODE UTF-8",
        "PID|1",
        f"PV1|1|I|{loc}",
        f"OBR|1|||182777000^monitoring of patient^SCT|||{t_msg}",
    ]
    for i, o in enumerate(payload["obs"], 1):
        term = terms.for_param(o["param"])
        ut = terms.for_unit(o["unit"], o["param"])
        status = {"valid": "F", "questionable": "P", "invalid": "X"}.get(
            o.get("status", "valid"))
        if status is None:
            raise ValueError(f"status {o.get('status')!r} has no OBX-11 equivalent")
        t_obs = _dtm(o["time"]) if o.get("time") else t_msg
        segs.append(f"OBX|{i}|NM|{term.code}^{term.ref_id}^MDC|1.0.0.{i}|{_num(o['value'])}|"
                    f"{ut.code}^{ut.ref_id}^MDC|||||{status}|||{t_obs}||||{dev}")
    return "\r".join(segs) + "\r"


def pcd01_stream(lines: Iterable[dict[str, Any]], hl7_config: Hl7Config | None = None,
                 skipped: dict[str, int] | None = None) -> Iterator[str]:
    """The simulator's ward stream (recording lines ``{"rx", "topic", "payload"}``) as PCD-01
    messages. Only ``obs`` lines have a PCD-01 form; the others are counted in ``skipped``
    by kind. Observations with a status that has no OBX-11 equivalent (``calibrating``,
    ``test``) are left out of their message (counted as ``obs_status_<status>``)."""
    terms = load_terms()
    for line in lines:
        parts = line["topic"].split("/")
        kind = parts[-1] if len(parts) == 4 else "?"
        if kind != "obs" or not isinstance(line.get("payload"), dict):
            if skipped is not None:
                skipped[kind] = skipped.get(kind, 0) + 1
            continue
        p = dict(line["payload"])
        keep = []
        for o in p["obs"]:
            st = o.get("status", "valid")
            if st in ("valid", "questionable", "invalid"):
                keep.append(o)
            elif skipped is not None:
                skipped[f"obs_status_{st}"] = skipped.get(f"obs_status_{st}", 0) + 1
        if not keep:
            continue
        p["obs"] = keep
        yield pcd01_message(p, parts[1], parts[2], rx=line.get("rx"), hl7_config=hl7_config,
                            terms=terms)


def write_hl7_file(lines: Iterable[dict[str, Any]], path: str | Path | IO[str],
                   hl7_config: Hl7Config | None = None) -> int:
    """Write the ward stream as PCD-01 messages, one segment a line (CRLF-free: CR endings
    are kept as LF in the file for readability; the reader accepts both). Returns the count."""
    n = 0
    fh = open(path, "w", encoding="utf-8", newline="") if isinstance(path, (str, Path)) \
        else path
    try:
        for msg in pcd01_stream(lines, hl7_config):
            fh.write(msg.replace("\r", "\n"))
            n += 1
    finally:
        if isinstance(path, (str, Path)):
            fh.close()
    return n
