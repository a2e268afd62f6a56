"""The synchronous processing core: one message in, what happened out.

Every path (live MQTT, replay of a recording, the in-process demo) calls
:meth:`Processor.feed` with the topic, the payload and the arrival time, and collects rows to
store and messages to publish with :meth:`Processor.drain`. The core does no I/O and reads no
clock: time comes from the messages (and from :meth:`Processor.tick` where live operation
needs the wall clock), so a recording replays to identical results.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections import deque
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Iterable

from pydantic import ValidationError

from .config import Config
from .derive import DERIVED_UNITS, Current, derive_all, bsa_dubois, bsa_mosteller
from .rules.protocol import RulesLayer
from .units import BY_DIMENSION, CANONICAL, UNITS
from .wire import (PARAMS, PAYLOAD_MODELS, TOPIC_KINDS_OUT, AdmitMessage, CommandMessage,
                   NoteMessage, ObsMessage, TopicError, parse_topic)

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def epoch(t: datetime) -> float:
    """Seconds since 1970-01-01T00:00:00Z of an aware datetime (exact to the microsecond)."""
    d = t - _EPOCH
    return d.days * 86400.0 + d.seconds + d.microseconds / 1e6


def iso(t: float) -> str:
    """RFC 3339 UTC text, millisecond precision, for epoch seconds."""
    return datetime.fromtimestamp(t, timezone.utc).isoformat(
        timespec="milliseconds").replace("+00:00", "Z")


_INPUT_TEXT: dict[tuple[str, float], str] = {}


def inputs_json(inputs: Iterable[tuple[str, float]]) -> str:
    """Provenance of a derived value as compact JSON: ``[["HR",<epoch s>],...]``.

    The text of each (param, time) pair is cached: the inputs of one message's derived values
    share a few measurement times, and float formatting dominated this step.

    >>> inputs_json((("HR", 1.5), ("CO", 2.0)))
    '[["HR",1.5],["CO",2.0]]'
    """
    cache = _INPUT_TEXT
    parts = []
    for pair in inputs:
        s = cache.get(pair)
        if s is None:
            if len(cache) > 50_000:
                cache.clear()
            s = cache[pair] = f'["{pair[0]}",{pair[1]!r}]'
        parts.append(s)
    return "[" + ",".join(parts) + "]"


def format_validation_error(err: ValidationError, limit: int = 5) -> str:
    """Turn pydantic's errors into one line a person can act on: field path, problem, input."""
    parts = []
    for e in err.errors(include_url=False)[:limit]:
        loc = ""
        for item in e["loc"]:
            if isinstance(item, int):
                loc += f"[{item}]"
            else:
                loc += ("." if loc else "") + str(item)
        msg = e["msg"].removeprefix("Value error, ")
        if e["type"] == "json_invalid":
            parts.append(f"payload is not valid JSON ({e.get('ctx', {}).get('error', msg)})")
            continue
        if e["type"] == "model_type" or e["type"] == "model_attributes_type":
            parts.append("payload must be a JSON object")
            continue
        got = e.get("input")
        shown = "" if e["type"] == "missing" or not e["loc"] else f" (got {_short(got)})"
        parts.append(f"{loc or 'payload'}: {msg}{shown}")
    more = len(err.errors()) - limit
    if more > 0:
        parts.append(f"and {more} more problem(s)")
    return "; ".join(parts)


def _short(v: Any) -> str:
    r = json.dumps(v, default=str) if not isinstance(v, str) else repr(v)
    return r if len(r) <= 60 else r[:57] + "..."


#: where each effective value of :func:`derive_all` can come from
EFFECTIVE_SOURCES = {
    "MAP": frozenset({"ABP_MEAN", "ABP_SYS", "ABP_DIA", "NIBP_MEAN", "NIBP_SYS", "NIBP_DIA"}),
    "SBP": frozenset({"ABP_SYS", "NIBP_SYS"}),
    "PAP_MEAN": frozenset({"PAP_MEAN", "PAP_SYS", "PAP_DIA"}),
    "HR": frozenset({"HR", "PR"}), "SV": frozenset({"SV", "HR", "PR", "CO"}),
    "CO": frozenset({"CO", "HR", "PR", "SV"}),
}

#: column order of the observation row tuples
OBSERVATION_COLUMNS = ("message_id", "bed_id", "param", "time", "value", "unit", "raw_value",
                       "raw_unit", "status", "late")


@dataclass
class Outputs:
    """What the core produced since the last drain: rows per table and messages to publish."""

    beds: list[dict] = field(default_factory=list)
    messages: list[dict] = field(default_factory=list)
    #: the hot table: tuples in the order of :data:`OBSERVATION_COLUMNS`
    observations: list[tuple] = field(default_factory=list)
    derived: list[dict] = field(default_factory=list)
    admissions: list[dict] = field(default_factory=list)
    notes: list[dict] = field(default_factory=list)
    commands: list[dict] = field(default_factory=list)
    rejected: list[dict] = field(default_factory=list)
    alarm_events: list[dict] = field(default_factory=list)
    #: (topic, JSON-able payload, retain) for the live path
    publish: list[tuple[str, Any, bool]] = field(default_factory=list)
    duplicates: int = 0

    TABLES = ("beds", "messages", "observations", "derived", "admissions", "notes",
              "commands", "rejected", "alarm_events")

    def row_count(self) -> int:
        return sum(len(getattr(self, t)) for t in self.TABLES)


@dataclass
class Counters:
    messages: int = 0
    observations: int = 0
    duplicates: int = 0
    late: int = 0
    derived_computed: int = 0
    derived_stored: int = 0
    alarm_events: int = 0
    rejected: dict[str, int] = field(default_factory=dict)

    def reject(self, category: str) -> None:
        self.rejected[category] = self.rejected.get(category, 0) + 1


class _Bed:
    __slots__ = ("id", "unit", "bed", "key", "latest", "newest", "bsa", "stored")

    def __init__(self, bed_id: int, unit: str, bed: str) -> None:
        self.id = bed_id
        self.unit = unit
        self.bed = bed
        self.key = f"{unit}/{bed}"
        self.latest: dict[str, Current] = {}
        self.newest = -math.inf            # newest measurement time seen (event time)
        self.bsa: tuple[float, float] | None = None
        self.stored: dict[str, tuple[float, float]] = {}   # derived param -> (time, value)

    def reset(self) -> None:
        self.latest.clear()
        self.bsa = None
        self.stored.clear()


def obs_identity(seq: int, t: float) -> int:
    """(seq, time) of an obs message as one exact integer: seq above, the time in whole
    microseconds below (2^52 us reach past the year 2100). An int takes about a third of the
    memory of a (seq, time) tuple, and thousands of devices x hundreds of identities add up.

    >>> obs_identity(1, 0.000001) == (1 << 52) + 1
    True
    """
    return (seq << 52) + round(t * 1e6)


class _Dedup:
    """Recent message identities per device, bounded (at-least-once redeliveries are recent)."""

    def __init__(self, per_device: int) -> None:
        self.per_device = per_device
        self.seen: dict[str, tuple[set, deque]] = {}

    def check_and_add(self, device: str, ident: Any) -> bool:
        """True when ``ident`` was already seen for ``device``; remembers it otherwise."""
        entry = self.seen.get(device)
        if entry is None:
            entry = self.seen[device] = (set(), deque())
        s, q = entry
        if ident in s:
            return True
        s.add(ident)
        q.append(ident)
        if len(q) > self.per_device:
            s.discard(q.popleft())
        return False


class RecordingLineBytes(bytes):
    """A whole recording line standing in for its payload (the replay's fast path); a reject
    stores the payload part of it, like any other reject."""


class Reject(Exception):
    def __init__(self, category: str, reason: str) -> None:
        super().__init__(reason)
        self.category = category
        self.reason = reason


class Processor:
    """Wire format in, rows and published messages out. Not thread-safe; one per worker."""

    def __init__(self, config: Config | None = None, *, rules: RulesLayer | None = None,
                 publish: bool = True,
                 next_ids: dict[str, int] | None = None,
                 known_beds: Iterable[tuple[int, str, str]] = (),
                 known_messages: Iterable[tuple[str, Any]] = ()) -> None:
        self.cfg = config or Config()
        self.rules = rules
        #: build the messages a live sink publishes (a replay into a database needs none)
        self.publish = publish
        ids = next_ids or {}
        self._next_message = ids.get("messages", 1)
        self._next_bed = ids.get("beds", 1)
        self.beds: dict[tuple[str, str], _Bed] = {}
        for bed_id, unit, bed in known_beds:
            self.beds[(unit, bed)] = _Bed(bed_id, unit, bed)
            self._next_bed = max(self._next_bed, bed_id + 1)
        self.dedup = _Dedup(self.cfg.ingest.dedup_per_device)
        for device, ident in known_messages:
            self.dedup.check_and_add(device, ident)
        self.counters = Counters()
        self.out = Outputs()
        ing = self.cfg.ingest
        self._plausible = {p: (b.low, b.high) for p, b in ing.plausible.items()}
        self._max_age = dict(self.cfg.derive.max_age_s)
        self._bsa_fn = bsa_dubois if self.cfg.derive.bsa_formula == "dubois" else bsa_mosteller
        self._units = {u.id: set(u.beds) for u in self.cfg.units}
        self._topics: dict[str, Any] = {}
        # (param, unit) -> (factor, offset, canonical unit, plausible low, high), precomputed
        # for every valid pairing so the per-observation work is one dictionary look-up
        self._conv: dict[tuple[str, str], tuple[float, float, str, float, float]] = {}
        for p, spec in PARAMS.items():
            lo, hi = self._plausible[p]
            for code in BY_DIMENSION[spec.dimension]:
                u = UNITS[code]
                self._conv[(p, code)] = (u.factor, u.offset, CANONICAL[spec.dimension], lo, hi)
        self._param_list = ", ".join(PARAMS)

    # ------------------------------------------------------------------ public API

    def drain(self) -> Outputs:
        """Return everything produced since the last call and start a fresh buffer."""
        out, self.out = self.out, Outputs()
        return out

    def feed(self, topic: str, payload: bytes | str | dict, rx: datetime | float) -> None:
        """Process one received message. Never raises for bad input: it becomes a reject."""
        rx_t = rx if isinstance(rx, float) else epoch(rx)
        try:
            self._feed(topic, payload, rx_t)
        except Reject as r:
            self._reject(r.category, r.reason, topic, payload, rx_t)

    def reject_unreadable(self, topic: str, raw: bytes | str, rx: float | None,
                          reason: str, category: str = "unreadable") -> None:
        """Store input that never became a message (e.g. a broken recording line)."""
        self._reject(category, reason, topic, raw, rx)

    def tick(self, now: float) -> None:
        """Advance time-driven conditions (silent feeds, pause expiry) to ``now``."""
        if self.rules is not None:
            self._rule_events(self.rules.tick(now))

    # ------------------------------------------------------------------ internals

    def feed_obs(self, topic: str, msg: ObsMessage, rx: float,
                 payload: bytes | str | dict) -> None:
        """Process an ``obs`` message that was already validated against :class:`ObsMessage`
        (the replay's fast path parses whole recording lines in one go). ``payload`` is kept
        for the raw bytes of any reject."""
        try:
            tp = self._route(topic)
            if tp.kind != "obs":
                raise Reject("bad_topic", f"topic {topic!r}: not an obs topic")
            self._accept(tp, topic, msg, rx, payload)
        except Reject as r:
            self._reject(r.category, r.reason, topic, payload, rx)

    def _route(self, topic: str):
        """The parsed topic, checked against the served units (valid ones are cached)."""
        tp = self._topics.get(topic)
        if tp is not None:
            return tp
        try:
            tp = parse_topic(topic)
        except TopicError as e:
            raise Reject("bad_topic", str(e)) from None
        if tp.kind in TOPIC_KINDS_OUT:
            raise Reject("bad_topic", f"topic {topic!r}: '{tp.kind}' is published by "
                                      "hemostream, it is not an input")
        if self._units:
            beds = self._units.get(tp.unit)
            if beds is None:
                raise Reject("unit_not_served", f"topic {topic!r}: unit {tp.unit!r} is not "
                             "in this instance's configuration")
            if beds and tp.bed not in beds:
                raise Reject("bed_not_configured", f"topic {topic!r}: bed {tp.bed!r} is not "
                             f"configured for unit {tp.unit!r}")
        if len(self._topics) < 200_000:
            self._topics[topic] = tp
        return tp

    def _feed(self, topic: str, payload: bytes | str | dict, rx: float) -> None:
        ing = self.cfg.ingest
        if not isinstance(payload, dict) and len(payload) > ing.max_payload_bytes:
            raise Reject("too_large", f"payload is {len(payload)} bytes; the limit is "
                                      f"{ing.max_payload_bytes} bytes (not parsed)")
        tp = self._route(topic)
        model = PAYLOAD_MODELS[tp.kind]
        try:
            if isinstance(payload, dict):
                msg = model.model_validate(payload)
            else:
                msg = model.model_validate_json(payload)
        except ValidationError as e:
            raise Reject(_category(e), format_validation_error(e)) from None
        self._accept(tp, topic, msg, rx, payload)

    def _accept(self, tp, topic: str, msg: Any, rx: float, payload: bytes | str | dict) -> None:
        ing = self.cfg.ingest
        t = epoch(msg.time)
        if t - rx > ing.max_clock_skew_s:
            raise Reject("clock_skew", f"time: {msg.time.isoformat()} is {t - rx:.0f} s ahead "
                         f"of arrival {iso(rx)} (limit {ing.max_clock_skew_s:g} s); "
                         "check the gateway's clock")
        bed = self.beds.get((tp.unit, tp.bed)) or self._bed(tp.unit, tp.bed)
        if tp.kind == "obs":
            self._obs(bed, topic, msg, t, rx, payload)
        else:
            ident = (tp.kind, t, hashlib.sha1(msg.model_dump_json().encode()).hexdigest()[:16])
            if self.dedup.check_and_add(topic, ident):
                self.counters.duplicates += 1
                self.out.duplicates += 1
                return
            mid = self._message_row(bed, topic, tp.kind, rx, t, None, None, False, 0, ident[2])
            if tp.kind == "admit":
                self._admit(bed, mid, msg, t, rx)
            elif tp.kind == "note":
                self._note(bed, mid, msg, t)
            else:
                self._command(bed, mid, msg, t, rx)

    def _bed(self, unit: str, bed_name: str) -> _Bed:
        bed = self.beds.get((unit, bed_name))
        if bed is None:
            bed = self.beds[(unit, bed_name)] = _Bed(self._next_bed, unit, bed_name)
            self._next_bed += 1
            self.out.beds.append({"id": bed.id, "unit": unit, "bed": bed_name})
        return bed

    def _message_row(self, bed: _Bed, topic: str, kind: str, rx: float, t: float,
                     device: str | None, seq: int | None, late: bool, n_obs: int,
                     digest: str | None = None) -> int:
        mid = self._next_message
        self._next_message += 1
        self.counters.messages += 1
        self.out.messages.append({
            "id": mid, "bed_id": bed.id, "rx": rx, "topic": topic, "kind": kind,
            "device": device, "seq": seq, "time": t, "late": late, "n_obs": n_obs,
            "digest": digest})
        return mid

    def _obs(self, bed: _Bed, topic: str, msg: ObsMessage, t: float, rx: float,
             payload: bytes | str | dict) -> None:
        if self.dedup.check_and_add(msg.device, obs_identity(msg.seq, t)):
            self.counters.duplicates += 1
            self.out.duplicates += 1
            return
        late = t < bed.newest - self.cfg.ingest.late_after_s
        mid = self._message_row(bed, topic, "obs", rx, t, msg.device, msg.seq, late,
                                len(msg.obs))
        if late:
            self.counters.late += 1
        skew = self.cfg.ingest.max_clock_skew_s
        rows = self.out.observations
        conv = self._conv
        new: set[str] = set()
        nonvalid: dict[str, str] = {}
        latest = bed.latest
        bed_id = bed.id
        n = 0
        for i, o in enumerate(msg.obs):
            p = o.param
            c = conv.get((p, o.unit))
            if c is None:
                if p not in PARAMS:
                    reason = (f"obs[{i}].param: unknown parameter {p[:40]!r}; expected one of "
                              f"{self._param_list}")
                    cat = "unknown_param"
                else:
                    dim = PARAMS[p].dimension
                    reason = (f"obs[{i}].unit: {o.unit[:40]!r} is not a {dim} unit; expected "
                              f"one of {', '.join(BY_DIMENSION[dim])}")
                    cat = "bad_unit"
                self._reject(cat, reason, topic, payload, rx, i, msg.device, msg.seq)
                continue
            factor, offset, cunit, lo, hi = c
            raw = o.value
            value = raw * factor + offset
            if not lo <= value <= hi:
                self._reject("implausible", f"obs[{i}].value: {p} {value:g} {cunit} is outside "
                             f"the plausible range {lo:g} to {hi:g} {cunit}",
                             topic, payload, rx, i, msg.device, msg.seq)
                continue
            ot = t if o.time is None else epoch(o.time)
            if ot - rx > skew:
                self._reject("clock_skew", f"obs[{i}].time: {o.time.isoformat()} is "
                             f"{ot - rx:.0f} s ahead of arrival {iso(rx)} (limit {skew:g} s)",
                             topic, payload, rx, i, msg.device, msg.seq)
                continue
            status = o.status
            rows.append((mid, bed_id, p, ot, value, cunit, raw, o.unit, status, late))
            n += 1
            if late:
                continue
            if status != "valid":
                nonvalid[p] = status
                continue
            cur = latest.get(p)
            if cur is None or ot >= cur.time:
                latest[p] = Current(value, ot)
                new.add(p)
        self.counters.observations += n
        if late:
            return
        if t > bed.newest:
            bed.newest = t
        self._derive(bed, new, nonvalid, msg.device)

    def _derive(self, bed: _Bed, new: set[str], nonvalid: dict[str, str], device: str) -> None:
        now = bed.newest
        max_age = self._max_age
        cur = {p: c for p, c in bed.latest.items() if now - c.time <= max_age[p]}
        derived, eff = derive_all(cur, bed.bsa)
        self.counters.derived_computed += len(derived)
        st = self.cfg.store
        every, band = st.derived_every_s, st.derived_deadband
        stored = bed.stored
        fresh: dict[str, float] = {p: c[0] for p, c in cur.items()}
        for name, c in eff.items():
            fresh[name] = c[0]
            # an effective value (MAP, SBP ...) taken from a measured one is new when any of
            # its possible sources is; otherwise its limits and trends would never see it
            if name not in new and not new.isdisjoint(EFFECTIVE_SOURCES[name]):
                new.add(name)
        rows = self.out.derived
        bed_id = bed.id
        n_stored = 0
        for d in derived:
            param, value = d[0], d[1]
            fresh[param] = value
            last = stored.get(param)
            if (last is None or now - last[0] >= every
                    or abs(value - last[1]) > band * abs(last[1])):
                stored[param] = (now, value)
                rows.append({"bed_id": bed_id, "param": param, "time": now, "value": value,
                             "unit": DERIVED_UNITS[param], "inputs": inputs_json(d[2])})
                n_stored += 1
        self.counters.derived_stored += n_stored
        new.update([d[0] for d in derived])
        if self.rules is not None:
            self._rule_events(self.rules.on_values(bed.key, now, fresh, frozenset(new),
                                                   nonvalid, device))
        if self.publish:
            body: dict[str, Any] = {
                "v": 1, "time": iso(now), "values": {d[0]: d[1] for d in derived},
                "measured": {p: [c.value, iso(c.time)] for p, c in cur.items()}}
            if nonvalid:
                body["status"] = nonvalid
            if self.rules is not None:
                body["trends"] = self.rules.trend_directions(bed.key)
            self.out.publish.append((f"hemo/{bed.unit}/{bed.bed}/derived", body, False))

    def _admit(self, bed: _Bed, mid: int, msg: AdmitMessage, t: float, rx: float) -> None:
        bsa = None
        if msg.discharged:
            bed.reset()
        elif msg.height_cm is not None and msg.weight_kg is not None:
            bsa = self._bsa_fn(msg.height_cm, msg.weight_kg)
            bed.bsa = (bsa, t)
        else:
            bed.bsa = None
        limits = {p: lim.model_dump(exclude_none=True) for p, lim in msg.limits.items()}
        self.out.admissions.append({
            "message_id": mid, "bed_id": bed.id, "time": t, "height_cm": msg.height_cm,
            "weight_kg": msg.weight_kg, "bsa_m2": bsa,
            "bsa_formula": self.cfg.derive.bsa_formula if bsa is not None else None,
            "limits": json.dumps(limits, separators=(",", ":"), sort_keys=True),
            "discharged": msg.discharged})
        if bsa is not None:
            self.out.derived.append({
                "bed_id": bed.id, "param": "BSA", "time": t, "value": bsa, "unit": "m2",
                "inputs": inputs_json((("height_cm", t), ("weight_kg", t)))})
            self.counters.derived_stored += 1
        if self.rules is not None:
            self._rule_events(self.rules.on_admit(bed.key, t, limits, msg.discharged))

    def _note(self, bed: _Bed, mid: int, msg: NoteMessage, t: float) -> None:
        self.out.notes.append({
            "message_id": mid, "bed_id": bed.id, "time": t, "kind": msg.kind,
            "volume_ml": msg.volume_ml, "over_min": msg.over_min, "param": msg.param,
            "by": msg.by, "text": msg.text, "duration_s": msg.duration_s})
        if self.rules is not None:
            self._rule_events(self.rules.on_note(bed.key, t, msg.kind, msg.volume_ml,
                                                 msg.over_min, msg.param, msg.duration_s))

    def _command(self, bed: _Bed, mid: int, msg: CommandMessage, t: float, rx: float) -> None:
        result = "applied"
        if self.rules is None:
            result = "not applied: no rules engine in this pipeline"
        else:
            from .rules import CommandError
            try:
                self._rule_events(self.rules.on_command(bed.key, t, msg.action, msg.alarm,
                                                        msg.by))
            except CommandError as e:
                result = f"not applied: {e}"
        self.out.commands.append({
            "message_id": mid, "bed_id": bed.id, "time": t, "rx": rx, "action": msg.action,
            "alarm": msg.alarm, "by": msg.by, "result": result})

    def _rule_events(self, events: Iterable[Any]) -> None:
        for ev in events:
            row = ev.as_row()
            unit, _, bed_name = row.pop("bed").partition("/")
            bed = self._bed(unit, bed_name)
            row["bed_id"] = bed.id
            row["details"] = json.dumps(row.get("details") or {}, separators=(",", ":"),
                                        sort_keys=True, default=str)
            self.out.alarm_events.append(row)
            self.counters.alarm_events += 1
            if not self.publish:
                continue
            self.out.publish.append((f"hemo/{unit}/{bed_name}/alarm",
                                     {"v": 1, "event": {**ev.as_row(), "time": iso(ev.time)}},
                                     False))
            state = self.rules.alarm_state(ev.bed)
            self.out.publish.append((f"hemo/{unit}/{bed_name}/alarm",
                                     {"v": 1, "time": iso(ev.time), "state": state}, True))

    def _reject(self, category: str, reason: str, topic: str, payload: bytes | str | dict,
                rx: float | None, obs_index: int | None = None, device: str | None = None,
                seq: int | None = None) -> None:
        if isinstance(payload, RecordingLineBytes):
            try:
                payload = json.loads(payload)["payload"]
            except (ValueError, KeyError, TypeError):
                pass
        if isinstance(payload, dict):
            raw = json.dumps(payload, separators=(",", ":"), default=str).encode()
        elif isinstance(payload, str):
            raw = payload.encode("utf-8", "surrogateescape")
        else:
            raw = bytes(payload)
        self.counters.reject(category)
        self.out.rejected.append({
            "rx": rx, "topic": topic[:512], "category": category, "reason": reason,
            "obs_index": obs_index, "device": device, "seq": seq,
            "raw": raw[: self.cfg.ingest.stored_raw_bytes], "size": len(raw)})


def _category(err: ValidationError) -> str:
    errs = err.errors(include_url=False)
    first = errs[0]
    if first["type"] == "json_invalid":
        return "invalid_json"
    if first["loc"] and first["loc"][0] == "v":
        return "bad_version"
    if any(e["type"] == "missing" for e in errs):
        return "missing_field"
    return "bad_field"
