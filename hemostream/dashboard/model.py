"""The dashboard's picture of a unit, built only from what the service publishes.

:class:`UnitView` takes the messages of the wire format's output topics (``derived``,
``alarm``) — and, where it sees them, ``note`` input messages — whether they arrive from a
broker (``hemostream watch``) or straight from an in-process pipeline (``hemostream demo``).
It keeps, per bed, the newest value of every parameter with its measurement time, the trend
direction, the current alarm state, recent alarm events, notes, the latest fluid-challenge
result and pattern read-out, and a short history of MAP and CO for the trend strips.
Nothing here reads a clock: the caller says what time it is.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from typing import Any

from ..core.alarms import PRIORITY_RANK
from ..core.config import DEFAULT_MAX_AGE
from ..core.display import GROUND_TRUTH_NOTES
from ..core.wire import is_status_topic, split_topic
from ..core.wire import parse_time_or_none  # None when missing or without an offset

#: how long a derived value stays current without a new publication (seconds)
DERIVED_MAX_AGE = 30.0
#: trend strip: 30 minutes at one point per 30 seconds
STRIP_SECONDS = 30 * 60
STRIP_STEP = 30.0


_MEAN_SRC = ("ABP_MEAN", "ABP_SYS", "NIBP_MEAN", "NIBP_SYS")
_SYS_SRC = ("ABP_SYS", "NIBP_SYS")
_RATE_SRC = ("HR", "PR")
#: the measured inputs of each derived value, as groups of alternative sources
#: (the derivations of :mod:`hemostream.core.derive`)
DERIVED_INPUTS: dict[str, tuple[tuple[str, ...], ...]] = {
    "MAP": (_MEAN_SRC,), "PP": (_SYS_SRC,), "SI": (_RATE_SRC, _SYS_SRC),
    "MSI": (_RATE_SRC, _MEAN_SRC), "CI": (("CO",),), "SVR": (_MEAN_SRC, ("CVP",), ("CO",)),
    "SVRI": (_MEAN_SRC, ("CVP",), ("CO",)), "PVR": (("PAP_MEAN",), ("PAWP",), ("CO",)),
    "LVSWI": (_MEAN_SRC, ("PAWP",), ("CO",)), "RVSWI": (("PAP_MEAN",), ("CVP",), ("CO",)),
}


@dataclass
class Reading:
    value: float
    time: float
    #: ``ok`` or why the value is not a measurement of the patient now (core/quality.py)
    quality: str = "ok"
    reason: str = ""

    def age(self, now: float) -> float:
        return max(0.0, now - self.time)


@dataclass
class BedState:
    key: str                                   # "UNIT/BED"
    values: dict[str, Reading] = field(default_factory=dict)
    max_age: dict[str, float] = field(default_factory=dict)
    trends: dict[str, str] = field(default_factory=dict)
    status: dict[str, str] = field(default_factory=dict)   # non-valid channel statuses
    alarms: list[dict] = field(default_factory=list)      # active, from the retained state
    history: deque = field(default_factory=lambda: deque(maxlen=200))   # alarm events
    notes: deque = field(default_factory=lambda: deque(maxlen=50))
    fluid_challenge: dict | None = None
    profile: str | None = None
    strip_map: deque = field(default_factory=lambda: deque(maxlen=int(STRIP_SECONDS / STRIP_STEP)))
    strip_co: deque = field(default_factory=lambda: deque(maxlen=int(STRIP_SECONDS / STRIP_STEP)))
    last_strip: float = float("-inf")
    last_time: float = float("-inf")

    @property
    def bed(self) -> str:
        return self.key.split("/", 1)[1]

    def _own_stale(self, param: str, r: Reading, now: float) -> bool:
        limit = self.max_age.get(param, DEFAULT_MAX_AGE.get(param, DERIVED_MAX_AGE))
        return r.age(now) > limit

    def reading(self, param: str, now: float) -> tuple[Reading | None, bool]:
        """(reading, stale): a value older than its expected interval is stale; a derived
        value is stale too once every source of one of its inputs is (a shock index is no
        more current than the heart rate it was computed from)."""
        r = self.values.get(param)
        if r is None:
            return None, False
        if self._own_stale(param, r, now):
            return r, True
        for group in DERIVED_INPUTS.get(param, ()):
            have = [(p, self.values[p]) for p in group if p in self.values]
            if have and all(self._own_stale(p, x, now) for p, x in have):
                return r, True
        return r, False

    def mark(self, param: str) -> tuple[str, str] | None:
        """(quality, reason) of the bed's value of ``param`` when it is not ``ok``: such a
        value is shown as what it is, never as a plain current number."""
        r = self.values.get(param)
        if r is None or r.quality == "ok":
            return None
        return r.quality, r.reason

    def top_alarm(self) -> dict | None:
        return self.alarms[0] if self.alarms else None


class UnitView:
    """All beds of the unit(s) being watched, fed with (topic, payload) messages."""

    def __init__(self, max_age: dict[str, float] | None = None) -> None:
        self.beds: dict[str, BedState] = {}
        self.max_age = dict(DEFAULT_MAX_AGE)
        if max_age:
            self.max_age.update(max_age)
        self.messages = 0
        self.newest = float("-inf")            # newest event time seen
        self.service: dict[str, Any] = {}      # last status / health message

    def bed(self, key: str) -> BedState:
        b = self.beds.get(key)
        if b is None:
            b = self.beds[key] = BedState(key, max_age=self.max_age)
        return b

    def sorted_beds(self) -> list[BedState]:
        return [self.beds[k] for k in sorted(self.beds)]

    def alarm_list(self) -> list[tuple[BedState, dict]]:
        """Every active alarm of the unit, highest priority first, then newest first."""
        items = [(b, a) for b in self.beds.values() for a in b.alarms]
        items.sort(key=lambda ba: (-PRIORITY_RANK.get(ba[1].get("priority"), 0),
                                   -(ba[1].get("since") or 0), ba[0].key))
        return items

    # ------------------------------------------------------------------ feeding

    def apply(self, topic: str, payload: Any) -> None:
        """Take one published (or observed input) message. Unknown shapes are ignored."""
        t = split_topic(topic)
        if not isinstance(payload, dict) or t is None:
            return
        if is_status_topic(t):
            self.service = payload
            return
        key = f"{t.unit}/{t.bed}"
        kind = t.kind
        self.messages += 1
        if kind == "derived":
            self._derived(self.bed(key), payload)
        elif kind == "alarm":
            self._alarm(self.bed(key), payload)
        elif kind == "note":
            if payload.get("kind") in GROUND_TRUTH_NOTES:
                return            # a simulator's answer key, not a clinical note
            b = self.bed(key)
            t = parse_time_or_none(payload.get("time"))
            b.notes.append({"time": t, "kind": payload.get("kind"),
                            "volume_ml": payload.get("volume_ml"), "param": payload.get("param"),
                            "by": payload.get("by")})

    def _derived(self, b: BedState, p: dict) -> None:
        t = parse_time_or_none(p.get("time"))
        if t is None:
            return
        b.last_time = max(b.last_time, t)
        self.newest = max(self.newest, t)
        marks = _marks(p.get("quality"))
        for name, v in (p.get("values") or {}).items():
            if isinstance(v, int | float):
                b.values[name] = Reading(float(v), t)
        # a derived value that is not ok (an artifact input): kept to be shown as such
        for name, v in (p.get("withheld") or {}).items():
            if isinstance(v, int | float):
                q, why = marks.get(name, ("artifact", ""))
                b.values[name] = Reading(float(v), t, q, why)
        for name, pair in (p.get("measured") or {}).items():
            if isinstance(pair, list) and len(pair) == 2 and isinstance(pair[0], int | float):
                mt = parse_time_or_none(pair[1])
                if mt is not None:
                    old = b.values.get(name)
                    if old is None or mt >= old.time:
                        q, why = marks.get(name, ("ok", ""))
                        b.values[name] = Reading(float(pair[0]), mt, q, why)
        for name, (q, why) in marks.items():     # e.g. a channel sending "calibrating"
            r = b.values.get(name)
            if r is not None and r.quality == "ok":
                b.values[name] = Reading(r.value, r.time, q, why)
        b.status = dict(p.get("status") or {})
        b.trends.update(p.get("trends") or {})
        if t - b.last_strip >= STRIP_SECONDS / b.strip_map.maxlen:
            b.last_strip = t
            m = self._current(b, ("ABP_MEAN", "MAP", "NIBP_MEAN"), t)
            c = self._current(b, ("CO",), t)
            b.strip_map.append(m)
            b.strip_co.append(c)

    def _current(self, b: BedState, names: tuple[str, ...], now: float) -> float | None:
        for n in names:
            r, stale = b.reading(n, now)
            if r is not None and not stale and r.quality == "ok":
                return r.value
        return None

    def _alarm(self, b: BedState, p: dict) -> None:
        if "state" in p and isinstance(p["state"], dict):
            alarms = [a for a in p["state"].get("alarms", []) if isinstance(a, dict)]
            alarms.sort(key=lambda a: (-PRIORITY_RANK.get(a.get("priority"), 0),
                                       -(a.get("since") or 0)))
            b.alarms = alarms
            t = parse_time_or_none(p.get("time"))
            if t is not None:
                self.newest = max(self.newest, t)
        ev = p.get("event")
        if isinstance(ev, dict):
            ev = dict(ev)
            ev["time_s"] = parse_time_or_none(ev.get("time"))
            b.history.append(ev)
            if ev.get("rule") == "fluid_challenge" and ev.get("transition") == "result":
                b.fluid_challenge = ev
            elif ev.get("transition") == "profile":
                details = ev.get("details") or {}
                b.profile = details.get("text") or details.get("profile_text") \
                    or details.get("profile")


def _marks(q: Any) -> dict[str, tuple[str, str]]:
    """The ``quality`` of a derived message: name -> (quality, reason), not-ok ones only."""
    out: dict[str, tuple[str, str]] = {}
    if isinstance(q, dict):
        for name, m in q.items():
            if isinstance(m, dict) and isinstance(m.get("quality"), str) \
                    and m["quality"] != "ok":
                out[name] = (m["quality"], str(m.get("reason") or ""))
    return out
