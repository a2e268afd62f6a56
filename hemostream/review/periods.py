"""Alarm periods from stored alarm events, and the bed's alarm state over time (pure).

An alarm is active from its ``raised`` transition until its ``cleared`` one (docs/rules.md,
"The alarm lifecycle"); in between its priority may rise (``updated`` with a stronger tier,
``escalated``), it may be acknowledged or have its audio paused, and its condition may end
while a latching alarm stays. An alarm still active when the stored data ends is *open*; for
durations it is closed at the end of its bed's observed span (or its last event, if later).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Iterable

PRIORITIES = ("high", "medium", "low")
RANK = {"none": 0, "info": 0, "low": 1, "medium": 2, "high": 3}
ALARM_CATEGORIES = ("physiological", "technical")


@dataclass(eq=False)
class AlarmPeriod:
    """One alarm from ``raised`` to ``cleared`` (``end`` is None while it is still open)."""

    alarm_id: str
    bed_id: int
    rule: str
    category: str
    start: float
    end: float | None = None
    #: (time, priority) from the raise on; a new entry whenever the priority rose
    priorities: list[tuple[float, str]] = field(default_factory=list)
    #: pieces of time when the condition was over but the alarm stayed (latched): [from, to]
    #: with ``to`` None while it lasts
    latched: list[list[float | None]] = field(default_factory=list)
    acks: list[tuple[float, str | None]] = field(default_factory=list)
    pauses: list[tuple[float, str | None]] = field(default_factory=list)
    escalated: bool = False
    message: str = ""
    value: float | None = None
    clear_reason: str | None = None
    details: dict[str, Any] = field(default_factory=dict)

    @property
    def raised_priority(self) -> str:
        return self.priorities[0][1]

    @property
    def peak_priority(self) -> str:
        return max((p for _, p in self.priorities), key=lambda p: RANK[p])

    @property
    def is_open(self) -> bool:
        return self.end is None

    def end_or(self, default: float) -> float:
        return self.end if self.end is not None else max(default, self.start)

    def duration_s(self, default_end: float) -> float:
        return self.end_or(default_end) - self.start

    @property
    def first_ack(self) -> float | None:
        return self.acks[0][0] if self.acks else None

    def latched_spans(self, default_end: float) -> list[tuple[float, float]]:
        """Pieces of the alarm after its condition had ended (a latching alarm waiting
        for acknowledgement); zero-length pieces (non-latching alarms) are left out."""
        end = self.end_or(default_end)
        out = []
        for a, b in self.latched:
            b = end if b is None else b
            if b > a:
                out.append((a, b))
        return out

    def segments(self, default_end: float) -> list[tuple[float, float, str]]:
        """(from, to, priority) pieces of the alarm, split where its priority rose."""
        end = self.end_or(default_end)
        out = []
        for i, (t, p) in enumerate(self.priorities):
            t1 = self.priorities[i + 1][0] if i + 1 < len(self.priorities) else end
            if t1 > t or (not out and i + 1 == len(self.priorities)):
                out.append((t, max(t, t1), p))
        return out


@dataclass
class InfoEvent:
    """Information from the rules (fluid-challenge opened/result, profile read-out)."""

    bed_id: int
    time: float
    rule: str
    transition: str
    value: float | None
    details: dict[str, Any]


def _details(text: str | None) -> dict[str, Any]:
    if not text:
        return {}
    try:
        d = json.loads(text)
    except ValueError:
        return {"raw": text}
    return d if isinstance(d, dict) else {"value": d}


def build_periods(rows: Iterable[Any]) -> tuple[list[AlarmPeriod], list[InfoEvent]]:
    """Alarm periods and information events from alarm_events rows (in stored order).

    Rows are processed in the order they were stored, which is the order the engine emitted
    them. A ``raised`` for an alarm id that is still open (a database that holds two replays
    of the same stream) closes the earlier period at that time.
    """
    periods: list[AlarmPeriod] = []
    info: list[InfoEvent] = []
    open_: dict[str, AlarmPeriod] = {}
    for r in rows:
        m = r._mapping if hasattr(r, "_mapping") else r
        cat = m["category"]
        tr = m["transition"]
        t = float(m["time"])
        if cat in ALARM_CATEGORIES and m["alarm_id"] in open_:
            # a database written before events were kept in time order: an event of an
            # alarm never counts as earlier than the alarm's raise
            t = max(t, open_[m["alarm_id"]].start)
        if cat not in ALARM_CATEGORIES:
            info.append(InfoEvent(m["bed_id"], t, m["rule"], tr, m["value"],
                                  _details(m["details"])))
            continue
        aid = m["alarm_id"]
        pri = m["priority"]
        if tr == "raised":
            prev = open_.pop(aid, None)
            if prev is not None:
                prev.end, prev.clear_reason = t, "raised again"
            d = _details(m["details"])
            p = AlarmPeriod(aid, m["bed_id"], m["rule"], cat, t, priorities=[(t, pri)],
                            message=str(d.get("message") or ""), value=m["value"], details=d)
            open_[aid] = p
            periods.append(p)
            continue
        p = open_.get(aid)
        if p is None:           # a transition of an alarm raised before the stored data began
            continue
        if pri in RANK and RANK[pri] > RANK[p.priorities[-1][1]]:
            p.priorities.append((t, pri))
        if tr == "escalated":
            p.escalated = True
        elif tr == "acknowledged":
            p.acks.append((t, m["by"]))
        elif tr == "audio_paused":
            p.pauses.append((t, m["by"]))
        elif tr == "condition_ended":
            p.latched.append([t, None])
        elif tr == "updated":
            if "condition_returned" in (_details(m["details"]).get("reason") or ()) \
                    and p.latched and p.latched[-1][1] is None:
                p.latched[-1][1] = t
        elif tr == "cleared":
            p.end = t
            if p.latched and p.latched[-1][1] is None:
                p.latched[-1][1] = t
            p.clear_reason = _details(m["details"]).get("reason")
            del open_[aid]
    return periods, info


def state_segments(periods: Iterable[AlarmPeriod], start: float, end: float
                   ) -> list[tuple[float, float, str, list[AlarmPeriod]]]:
    """The bed's alarm state over [start, end]: (from, to, highest active priority, the
    alarms active in that piece), for the pieces with at least one active alarm; adjacent
    pieces of the same priority are merged. Open alarms run to ``end``."""
    edges: list[tuple[float, int, str, AlarmPeriod]] = []
    for p in periods:
        for a, b, pri in p.segments(end):
            a, b = max(a, start), min(b, end)
            if b > a:
                edges.append((a, 1, pri, p))
                edges.append((b, -1, pri, p))
    edges.sort(key=lambda e: (e[0], e[1]))
    active: dict[str, list[AlarmPeriod]] = {"low": [], "medium": [], "high": []}
    out: list[tuple[float, float, str, list[AlarmPeriod]]] = []
    t_prev = start
    for t, d, pri, p in edges:
        state = next((q for q in PRIORITIES if active[q]), None)
        if state is not None and t > t_prev:
            who = list(dict.fromkeys(x for q in PRIORITIES for x in active[q]))
            if out and out[-1][2] == state and out[-1][1] == t_prev:
                a0, _, _, w0 = out[-1]
                out[-1] = (a0, t, state, list(dict.fromkeys(w0 + who)))
            else:
                out.append((t_prev, t, state, who))
        t_prev = t
        if d > 0:
            active[pri].append(p)
        else:
            active[pri].remove(p)
    return out


def time_in_state(periods: Iterable[AlarmPeriod], start: float, end: float) -> dict[str, float]:
    """Seconds of [start, end] the bed spent with no alarm and with its highest active alarm
    at each priority (open alarms run to ``end``)."""
    out = {"none": 0.0, "low": 0.0, "medium": 0.0, "high": 0.0}
    if end <= start:
        return out
    for a, b, pri, _ in state_segments(periods, start, end):
        out[pri] += b - a
    out["none"] = (end - start) - out["low"] - out["medium"] - out["high"]
    return out
