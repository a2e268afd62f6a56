"""The synchronous processing core: one message in, what happened out.

Size: the one entry of the core (feed, drain, tick) with the checks of each message kind; to
be split by message kind (issue 16).

Every path (live MQTT, replay of a recording, the in-process demo) calls
:meth:`Processor.feed` with the topic, the payload and the arrival time, and collects rows to
store and messages to publish with :meth:`Processor.drain`. The core does no I/O and reads no
clock: time comes from the messages (and from :meth:`Processor.tick` where live operation
needs the wall clock), so a recording replays to identical results.

The pieces it uses live beside it: :mod:`.outputs` (rows and publications), :mod:`.rejects`
(reject rows and their reasons), :mod:`.dedup` (duplicate detection), :mod:`.beds` (per-bed
state); times are :mod:`.wire`'s. Their public names are re-exported here.
"""

from __future__ import annotations

import hashlib
import json
import math
from datetime import datetime, timezone  # noqa: F401  (timezone: doctest)
from typing import Annotated, Any, Iterable, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictInt, StrictStr, ValidationError

from .beds import BedState
from .config import Config
from .dedup import Dedup, obs_identity, raw_digest  # noqa: F401  (for the store)
from .outputs import (OBSERVATION_COLUMNS, Counters, Outputs,  # noqa: F401  (re-exported)
                      inputs_json)
from .rejects import (RecordingLineBytes, Reject, category_of,  # noqa: F401
                      format_validation_error, reject_row, short)
from .derive import DERIVED_UNITS, Current, derive_all, bsa_dubois, bsa_mosteller
from .quality import ARTIFACT, OK, from_status, worst
from .rules.phrases import phrase
from .rules.protocol import RulesLayer
from .units import BY_DIMENSION, CANONICAL, UNITS
from .wire import epoch, format_epoch as iso  # noqa: F401  (re-exported)
from .wire import (PARAMS, PAYLOAD_MODELS, SEQ_MAX, TOPIC_KINDS_OUT, AdmitMessage,
                   CommandMessage, NoteMessage, Observation, ObsMessage, Time, TopicError,
                   parse_topic)

#: where each effective value of :func:`derive_all` can come from
EFFECTIVE_SOURCES = {
    "MAP": frozenset({"ABP_MEAN", "ABP_SYS", "ABP_DIA", "NIBP_MEAN", "NIBP_SYS", "NIBP_DIA"}),
    "SBP": frozenset({"ABP_SYS", "NIBP_SYS"}),
    "PAP_MEAN": frozenset({"PAP_MEAN", "PAP_SYS", "PAP_DIA"}),
    "HR": frozenset({"HR", "PR"}),
    # a stroke volume or output calculated from the other and HR is new only when the output
    # measurement is (see OUTPUT_PARAMS): a new HR does not make an old output new
    "SV": frozenset({"SV", "CO"}), "CO": frozenset({"CO", "SV"}),
}

#: the cardiac output measurements. A value derived from one of them (SV from CO, CI, SVI,
#: SVR, SVRI, PVR, LVSWI, RVSWI) is computed only in a message that brings a new output
#: measurement, and it is dated at that measurement: an intermittent (thermodilution) CO
#: gives one set of derived values per measurement, not one a second from the old CO and the
#: current HR; a continuous CO, new every message, gives them every message as before
#: (docs/rules.md, "Intermittent cardiac output")
OUTPUT_PARAMS = frozenset({"CO", "SV"})

def arrival_epoch(rx: Any) -> float | None:
    """Epoch seconds of an arrival time given as epoch seconds or an aware datetime, or None
    for anything else (naive datetimes, text, bools, NaN or infinite numbers).

    >>> arrival_epoch(1), arrival_epoch(datetime(1970, 1, 1, 0, 1, tzinfo=timezone.utc))
    (1.0, 60.0)
    >>> arrival_epoch(datetime(1970, 1, 1)) is None, arrival_epoch("now") is None
    (True, True)
    """
    if isinstance(rx, float):
        return rx if math.isfinite(rx) else None
    if isinstance(rx, int) and not isinstance(rx, bool):
        return float(rx)
    if isinstance(rx, datetime):
        return epoch(rx) if rx.utcoffset() is not None else None
    return None


class Processor:
    """Wire format in, rows and published messages out. Not thread-safe; one per worker."""

    def __init__(self, config: Config | None = None, *, rules: RulesLayer | None = None,
                 publish: bool = True,
                 next_ids: dict[str, int] | None = None,
                 known_beds: Iterable[tuple[int, str, str]] = (),
                 known_messages: Iterable[tuple[str, Any]] = (),
                 known_retained_rejects: Iterable[tuple[str, str]] = ()) -> None:
        self.cfg = config or Config()
        #: (topic, digest) of retained messages already stored as rejects: the broker sends
        #: a retained message again on every subscribe, it is not stored again
        self._retained_rejects: set[tuple[str, str]] = set(known_retained_rejects)
        self._retained_key: tuple[str, str] | None = None
        self.rules = rules
        #: build the messages a live sink publishes (a replay into a database needs none)
        self.publish = publish
        ids = next_ids or {}
        self._next_message = ids.get("messages", 1)
        self._next_bed = ids.get("beds", 1)
        self.beds: dict[tuple[str, str], BedState] = {}
        for bed_id, unit, bed in known_beds:
            self.beds[(unit, bed)] = BedState(bed_id, unit, bed)
            self._next_bed = max(self._next_bed, bed_id + 1)
        self.dedup = Dedup(self.cfg.ingest.dedup_per_device)
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

    def feed(self, topic: str, payload: bytes | str | dict, rx: Any, *,
             retained: bool = False) -> None:
        """Process one received message. Never raises for bad input: it becomes a reject.

        ``rx`` is the arrival time: epoch seconds (int or float) or an aware datetime.
        Anything else (a naive datetime, text, NaN) is a reject ``bad_arrival_time``.
        ``retained``: the broker's retained copy of a message, which it sends again on every
        subscribe; one already stored as a reject counts as a duplicate."""
        key = None
        if retained and isinstance(payload, (bytes, str)):
            key = (topic, raw_digest(payload))
            if key in self._retained_rejects:
                self.counters.duplicates += 1
                self.out.duplicates += 1
                return
        self._retained_key = key
        try:
            rx_t = arrival_epoch(rx)
            if rx_t is None:
                self._reject("bad_arrival_time",
                             f"arrival time: expected epoch seconds or an aware datetime, "
                             f"got {short(rx)} ({type(rx).__name__})", topic, payload, None)
                return
            try:
                self._feed(topic, payload, rx_t)
            except Reject as r:
                self._reject(r.category, r.reason, topic, payload, rx_t)
            except Exception as e:  # noqa: BLE001 - a fault of ours must not stop the unit
                self._internal_error(e, topic, payload, rx_t)
        finally:
            self._retained_key = None

    def reject_unreadable(self, topic: str, raw: bytes | str, rx: float | None,
                          reason: str, category: str = "unreadable") -> None:
        """Store input that never became a message (e.g. a broken recording line)."""
        self._reject(category, reason, topic, raw, rx)

    def tick(self, now: float) -> None:
        """Advance time-driven conditions (silent feeds, pause expiry) to ``now``."""
        if self.rules is not None:
            try:
                self._rule_events(self.rules.tick(now))
            except Exception as e:  # noqa: BLE001
                self._internal_error(e, "", b"", now)

    def _internal_error(self, e: Exception, topic: str, payload: bytes | str | dict,
                        rx: float | None) -> None:
        """A fault in hemostream itself while processing one message: what was produced for
        the message stays, the fault is kept for audit (category ``internal_error``, the
        exception and where it was raised) and the next message is processed as usual."""
        self.counters.internal_errors += 1
        tb = e.__traceback__
        while tb is not None and tb.tb_next is not None:
            tb = tb.tb_next
        where = (f"{tb.tb_frame.f_code.co_filename.rsplit('/', 1)[-1]}:{tb.tb_lineno}"
                 if tb is not None else "?")
        self._reject("internal_error", f"hemostream failed processing this message "
                     f"({e.__class__.__name__}: {str(e)[:200]} at {where}); what it produced "
                     "before the failure is kept", topic, payload, rx)

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
        except Exception as e:  # noqa: BLE001 - a fault of ours must not stop the unit
            self._internal_error(e, topic, payload, rx)

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
        index = None
        try:
            if isinstance(payload, dict):
                msg = model.model_validate(payload)
            else:
                msg = model.model_validate_json(payload)
        except ValidationError as e:
            if tp.kind != "obs" or not _only_in_observations(e):
                raise Reject(category_of(e), format_validation_error(e)) from None
            msg, index = self._good_observations(topic, payload, rx, e)
        self._accept(tp, topic, msg, rx, payload, index)

    def _good_observations(self, topic: str, payload: bytes | str | dict, rx: float,
                           err: ValidationError) -> tuple[ObsMessage, list[int]]:
        """An obs message whose envelope is valid but some observations are not: each bad
        observation is a reject of its own (with its index), the rest go on. When none is
        valid, the message is one reject."""
        doc = payload if isinstance(payload, dict) else json.loads(payload)
        env = _ObsEnvelope.model_validate(doc)
        good, index, bad = [], [], []
        for i, o in enumerate(env.obs):
            try:
                good.append(Observation.model_validate(o))
                index.append(i)
            except ValidationError as e:
                bad.append((i, e))
        if not good:
            raise Reject(category_of(err), format_validation_error(err))
        for i, ve in bad:
            self._reject(category_of(ve), format_validation_error(ve, prefix=f"obs[{i}]."),
                         topic, payload, rx, i, env.device, env.seq)
        return ObsMessage.model_construct(v=env.v, device=env.device, seq=env.seq,
                                          time=env.time, obs=good), index

    def _accept(self, tp, topic: str, msg: Any, rx: float, payload: bytes | str | dict,
                index: list[int] | None = None) -> None:
        ing = self.cfg.ingest
        t = epoch(msg.time)
        if t - rx > ing.max_clock_skew_s:
            raise Reject("clock_skew", f"time: {msg.time.isoformat()} is {t - rx:.0f} s ahead "
                         f"of arrival {iso(rx)} (limit {ing.max_clock_skew_s:g} s); "
                         "check the gateway's clock")
        bed = self.beds.get((tp.unit, tp.bed)) or self._bed(tp.unit, tp.bed)
        if tp.kind == "obs":
            self._obs(bed, topic, msg, t, rx, payload, index)
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

    def _bed(self, unit: str, bed_name: str) -> BedState:
        bed = self.beds.get((unit, bed_name))
        if bed is None:
            bed = self.beds[(unit, bed_name)] = BedState(self._next_bed, unit, bed_name)
            self._next_bed += 1
            self.out.beds.append({"id": bed.id, "unit": unit, "bed": bed_name})
        return bed

    def _message_row(self, bed: BedState, topic: str, kind: str, rx: float, t: float,
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

    def _obs(self, bed: BedState, topic: str, msg: ObsMessage, t: float, rx: float,
             payload: bytes | str | dict, index: list[int] | None = None) -> None:
        if self.dedup.check_and_add(msg.device, obs_identity(msg.seq, t)):
            self.counters.duplicates += 1
            self.out.duplicates += 1
            return
        late = t < bed.newest - self.cfg.ingest.late_after_s
        mid = self._message_row(bed, topic, "obs", rx, t, msg.device, msg.seq, late,
                                len(msg.obs) if index is None else index[-1] + 1)
        if late:
            self.counters.late += 1
        skew = self.cfg.ingest.max_clock_skew_s
        rows = self.out.observations
        first = len(rows)
        conv = self._conv
        new: set[str] = set()
        nonvalid: dict[str, str] = {}
        latest = bed.latest
        bed_id = bed.id
        n = 0
        # the bed's clock follows measurement time but may not run ahead of arrival by more
        # than bed_clock_lead_s: a value dated further ahead is stored, yet cannot stay
        # current against values that arrive after it
        ahead = rx + self.cfg.ingest.bed_clock_lead_s
        for k, o in enumerate(msg.obs):
            i = k if index is None else index[k]
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
                shown = o.time.isoformat() if o.time is not None else iso(ot)
                self._reject("clock_skew", f"obs[{i}].time: {shown} is "
                             f"{ot - rx:.0f} s ahead of arrival {iso(rx)} (limit {skew:g} s)",
                             topic, payload, rx, i, msg.device, msg.seq)
                continue
            status = o.status
            rows.append((mid, bed_id, p, ot, value, cunit, raw, o.unit, status, late,
                         OK if status == "valid" else from_status(status)))
            n += 1
            if late:
                continue
            if status != "valid":
                nonvalid[p] = status
                continue
            cur = latest.get(p)
            if cur is None or ot >= cur.time or cur.time > ahead:
                latest[p] = Current(value, ot)
                new.add(p)
        self.counters.observations += n
        if late:
            return
        clock = t if t <= ahead else ahead
        if clock > bed.newest:
            bed.newest = clock
        self._derive(bed, new, nonvalid, msg.device, first, rx)

    def _derive(self, bed: BedState, new: set[str], nonvalid: dict[str, str], device: str,
                first: int = 0, rx: float | None = None) -> None:
        now = bed.newest
        max_age = self._max_age
        cur = {p: c for p, c in bed.latest.items() if now - c.time <= max_age[p]}
        derived, eff = derive_all(cur, bed.bsa)
        output_new = not new.isdisjoint(OUTPUT_PARAMS)
        if not output_new:
            # nothing is re-derived from an output measurement that is not new
            derived = [d for d in derived if not _from_output(d[2])]
            for name in ("SV", "CO"):
                if name in eff and name not in cur:
                    del eff[name]
        self.counters.derived_computed += len(derived)
        st = self.cfg.store
        every, band = st.derived_every_s, st.derived_deadband
        stored = bed.stored
        fresh: dict[str, float] = {p: c[0] for p, c in cur.items()}
        times: dict[str, float] = {p: c[1] for p, c in cur.items()}
        for name, c in eff.items():
            fresh[name] = c[0]
            times[name] = c[1]
            # an effective value (MAP, SBP ...) taken from a measured one is new when any of
            # its possible sources is; otherwise its limits and trends would never see it
            if name not in new and not new.isdisjoint(EFFECTIVE_SOURCES[name]):
                new.add(name)
        dts: list[float] = []
        for d in derived:
            fresh[d[0]] = d[1]
            # a value derived from an output measurement belongs to that measurement's time
            dt = _output_time(d[2]) if output_new else None
            if dt is None:
                dt = now
            times[d[0]] = dt
            dts.append(dt)
        new.update([d[0] for d in derived])
        # a value that came with this message but is already older than its maximum age is
        # stored, yet it is not current: the rules see only what is current
        new.intersection_update(fresh)
        why: dict[str, str] = {}
        fault: Exception | None = None
        if self.rules is not None:
            try:
                self._rule_events(self.rules.on_values(bed.key, now, fresh, frozenset(new),
                                                       nonvalid, device,
                                                       {p: times[p] for p in new if p in times},
                                                       rx))
                reasons = getattr(self.rules, "artifact_reasons", None)
                if reasons is not None:
                    why = reasons(bed.key, now)
            except Exception as e:  # noqa: BLE001 - the values are stored all the same
                fault = e
        # quality (core/quality.py): a measured value the detector holds out is an
        # artifact; a derived value is the worst of its inputs and of its own channel
        if why:
            obs_rows = self.out.observations
            for k in range(first, len(obs_rows)):
                r = obs_rows[k]
                if r[10] == OK and r[2] in why:
                    obs_rows[k] = r[:10] + (ARTIFACT,)
        quality: dict[str, str] = {}
        rows = self.out.derived
        bed_id = bed.id
        n_stored = 0
        for d, dt in zip(derived, dts):
            param, value = d[0], d[1]
            q = OK
            if why:
                q = worst([ARTIFACT if param in why else OK]
                          + [ARTIFACT if p in why else OK for p, _ in d[2]])
                if q != OK:
                    quality[param] = q
            last = stored.get(param)
            # a change of quality is stored too: the reader must see where an artifact ends
            if (last is None or dt - last[0] >= every or q != last[2]
                    or abs(value - last[1]) > band * abs(last[1])):
                stored[param] = (dt, value, q)
                rows.append({"bed_id": bed_id, "param": param, "time": dt, "value": value,
                             "unit": DERIVED_UNITS[param], "inputs": inputs_json(d[2]),
                             "quality": q, "pairs": d[2]})
                n_stored += 1
        self.counters.derived_stored += n_stored
        if fault is not None:
            raise fault
        if self.publish:
            # a derived value that is not ok is not a current value: it is published apart
            # (``withheld``), and every value that is not ok is named in ``quality``
            body: dict[str, Any] = {
                "v": 1, "time": iso(now),
                "values": {d[0]: d[1] for d in derived if d[0] not in quality},
                "measured": {p: [c.value, iso(c.time)] for p, c in cur.items()}}
            if quality:
                body["withheld"] = {d[0]: d[1] for d in derived if d[0] in quality}
            marks: dict[str, dict[str, str]] = {}
            for d in derived:
                if d[0] in quality:
                    marks[d[0]] = {"quality": quality[d[0]],
                                   "reason": why.get(d[0]) or _inputs_reason(d, why)}
            for p in cur:
                if p in why:
                    marks[p] = {"quality": ARTIFACT, "reason": why[p]}
            for p, st_ in nonvalid.items():
                marks[p] = {"quality": from_status(st_), "reason": f"status {st_}"}
            if marks:
                body["quality"] = marks
            if nonvalid:
                body["status"] = nonvalid
            if self.rules is not None:
                body["trends"] = self.rules.trend_directions(bed.key)
            self.out.publish.append((f"hemo/{bed.unit}/{bed.bed}/derived", body, False))

    def _admit(self, bed: BedState, mid: int, msg: AdmitMessage, t: float, rx: float) -> None:
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

    def _note(self, bed: BedState, mid: int, msg: NoteMessage, t: float) -> None:
        self.out.notes.append({
            "message_id": mid, "bed_id": bed.id, "time": t, "kind": msg.kind,
            "volume_ml": msg.volume_ml, "over_min": msg.over_min, "param": msg.param,
            "by": msg.by, "text": msg.text, "duration_s": msg.duration_s})
        if self.rules is not None:
            self._rule_events(self.rules.on_note(bed.key, t, msg.kind, msg.volume_ml,
                                                 msg.over_min, msg.param, msg.duration_s))

    def _command(self, bed: BedState, mid: int, msg: CommandMessage, t: float, rx: float) -> None:
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
        if self.publish:            # the sender learns what became of it (`hemostream ack`)
            self.out.publish.append((f"hemo/{bed.unit}/{bed.bed}/alarm", {
                "v": 1, "command": {"time": iso(t), "action": msg.action, "alarm": msg.alarm,
                                    "by": msg.by, "result": result}}, False))

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
            word = getattr(self.rules, "phrase", None)
            self.out.publish.append((f"hemo/{unit}/{bed_name}/alarm",
                                     {"v": 1, "event": {**ev.as_row(), "time": iso(ev.time),
                                                        "phrase": word(ev.rule) if word
                                                        else phrase(ev.rule)}},
                                     False))
            assert self.rules is not None       # events come only from the rules
            state = self.rules.alarm_state(ev.bed)
            self.out.publish.append((f"hemo/{unit}/{bed_name}/alarm",
                                     {"v": 1, "time": iso(ev.time), "state": state}, True))

    def _reject(self, category: str, reason: str, topic: str, payload: bytes | str | dict,
                rx: float | None, obs_index: int | None = None, device: str | None = None,
                seq: int | None = None) -> None:
        self.counters.reject(category)
        if self._retained_key is not None and len(self._retained_rejects) < 100_000:
            self._retained_rejects.add(self._retained_key)
        self.out.rejected.append(reject_row(category, reason, topic, payload, rx, obs_index,
                                            device, seq, self.cfg.ingest.stored_raw_bytes))


def _inputs_reason(d: Any, why: dict[str, str]) -> str:
    """Why a derived value is not ok: the first of its inputs that is held out."""
    for p, _ in d[2]:
        if p in why:
            return f"{p}: {why[p]}"
    return "input not ok"


def _from_output(inputs: tuple[tuple[str, float], ...]) -> bool:
    """The derived value has a cardiac output measurement (CO or SV) among its inputs."""
    return any(p in OUTPUT_PARAMS for p, _ in inputs)


def _output_time(inputs: tuple[tuple[str, float], ...]) -> float | None:
    """Measurement time of the newest output measurement among the inputs, or None."""
    ts = [t for p, t in inputs if p in OUTPUT_PARAMS]
    return max(ts) if ts else None


class _ObsEnvelope(BaseModel):
    """An obs message with its observations left unchecked (to check them one by one)."""

    model_config = ConfigDict(extra="ignore", allow_inf_nan=False)
    v: Literal[1]
    device: Annotated[StrictStr, Field(min_length=1, max_length=64, pattern=r"^[\x21-\x7e]+$")]
    seq: Annotated[StrictInt, Field(ge=0, le=SEQ_MAX)]
    time: Time
    obs: Annotated[list[Any], Field(min_length=1, max_length=256)]


def _only_in_observations(err: ValidationError) -> bool:
    """Every error is inside one of the observations (obs[i]...), not in the envelope."""
    return all(len(e["loc"]) >= 3 and e["loc"][0] == "obs" and isinstance(e["loc"][1], int)
               for e in err.errors(include_url=False))
