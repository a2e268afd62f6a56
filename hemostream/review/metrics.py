"""Alarm-burden and detection figures (pure functions over periods, notes and commands).

The comparison (:func:`hemostream.review.runner.compare`) replays one recording under several
configurations and compares their alarm behaviour.

Each configuration's replay goes into its own SQLite database (in a temporary directory
unless ``keep_dir`` is given), in up to two worker processes; the figures are then computed
from what was stored (alarm_events, notes, commands, messages), the same way for every
configuration:

- **bed-days**: the observed span of each bed (first to last measurement time of its
  observation messages), summed, / 86400.
- **alarms**: ``raised`` transitions of physiological and technical alarms (information
  events such as fluid-challenge results and profile read-outs are not alarms), counted by
  the highest priority each alarm reached (a tier or an escalation raises it), by category
  and by rule, in total and per bed-day.
- **alarm-hours**: the time from ``raised`` to ``cleared`` summed over the alarms; an alarm
  still active when the data end is closed at the end of its bed's span (and counted as open).
- **time in each alarm state**: the share of bed-time during which the bed's highest active
  alarm was high, medium or low priority, or there was none.
- **short alarms**: alarms that ended by themselves (not acknowledged) within 2 minutes; many
  of these mark a rule that is noisy rather than informative (common practice, from memory).
- **acknowledgements** (only when the recording holds ``cmd`` messages): alarms acknowledged
  at all and within ``ack_within_s`` of being raised, the median time to acknowledge, and
  recorded commands that addressed no active alarm under this configuration.
- **detection**: for each ``deterioration_onset`` note, the delay from the note to the first
  physiological alarm raised on that bed (and to the first at medium or high priority), up to
  the next onset on the bed, the end of the bed's span or ``detect_within_s``, whichever comes
  first; no alarm in that window is a **missed** event, unless the recording of the bed ends
  before ``detect_within_s`` has passed (and before the next onset): such an onset is counted
  apart, **too late** in the recording to judge, since an alarm might still have come. Alarms
  already active at the onset are listed, since they may already have told staff.

These describe alarm behaviour on the given recording, not clinical validation.
"""

from __future__ import annotations

import statistics
from typing import Any

from ..core.processor import iso
from .periods import PRIORITIES, RANK, AlarmPeriod, InfoEvent, time_in_state
from .queries import BedInfo

SHORT_ALARM_S = 120.0
DAY_S = 86400.0


def _per_day(n: float, bed_days: float) -> float | None:
    return round(n / bed_days, 3) if bed_days > 0 else None


def _hours(s: float) -> float:
    return round(s / 3600.0, 4)


def burden(beds: dict[int, BedInfo], periods: list[AlarmPeriod],
           all_notes: list[dict[str, Any]], cmds: list[dict[str, Any]], *,
           ack_within_s: float = 300.0, detect_within_s: float = 3600.0) -> dict[str, Any]:
    """The alarm-burden and detection figures of one stored replay (see the module text),
    from its beds, alarm periods, notes and commands (read by :mod:`.queries`)."""

    bed_days = sum(b.span_s for b in beds.values()) / DAY_S
    by_bed: dict[int, list[AlarmPeriod]] = {}
    for p in periods:
        by_bed.setdefault(p.bed_id, []).append(p)

    def end_of(p: AlarmPeriod) -> float:
        b = beds.get(p.bed_id)
        return b.end if b is not None and b.end is not None else p.start

    by_priority = {q: 0 for q in PRIORITIES}
    by_category = {"physiological": 0, "technical": 0}
    rules: dict[str, dict[str, Any]] = {}
    total_s = 0.0
    open_n = 0
    escalated = 0
    for p in periods:
        pk = p.peak_priority
        by_priority[pk] = by_priority.get(pk, 0) + 1
        by_category[p.category] = by_category.get(p.category, 0) + 1
        d = p.duration_s(end_of(p))
        total_s += d
        open_n += p.is_open
        escalated += p.escalated
        r = rules.setdefault(p.rule, {"rule": p.rule, "category": p.category, "alarms": 0,
                                      "high": 0, "medium": 0, "low": 0, "seconds": 0.0,
                                      "short": 0, "durations": []})
        r["alarms"] += 1
        r[pk] += 1
        r["seconds"] += d
        r["durations"].append(d)
        if (not p.is_open and not p.acks and d <= SHORT_ALARM_S):
            r["short"] += 1
    rule_list = []
    for r in sorted(rules.values(), key=lambda r: (-r["alarms"], r["rule"])):
        durs = r.pop("durations")
        secs = r.pop("seconds")
        rule_list.append({**r, "per_bed_day": _per_day(r["alarms"], bed_days),
                          "alarm_hours": _hours(secs),
                          "median_duration_s": round(statistics.median(durs), 1)})

    # share of bed-time in each alarm state
    state_s = {"none": 0.0, "low": 0.0, "medium": 0.0, "high": 0.0}
    span_total = 0.0
    for bid, b in beds.items():
        if b.start is None or b.end is None or b.end <= b.start:
            continue
        span_total += b.end - b.start
        for k, v in time_in_state(by_bed.get(bid, []), b.start, b.end).items():
            state_s[k] += v
    state_share = ({k: round(v / span_total, 6) for k, v in state_s.items()}
                   if span_total > 0 else None)

    # acknowledgements
    if cmds:
        ack_delays = [p.first_ack - p.start for p in periods if p.first_ack is not None]
        acks = {
            "commands": len(cmds),
            "commands_not_applied": sum(1 for c in cmds if c["result"] != "applied"),
            "alarms": len(periods),
            "acknowledged": len(ack_delays),
            "within": sum(1 for d in ack_delays if d <= ack_within_s + 1e-9),
            "within_s": ack_within_s,
            "median_time_to_ack_s": (round(statistics.median(ack_delays), 1)
                                     if ack_delays else None),
        }
    else:
        acks = None

    # detection of marked deteriorations
    onsets = [n for n in all_notes if n["kind"] == "deterioration_onset"]
    events = []
    for i, n in enumerate(onsets):
        b = beds.get(n["bed_id"])
        t0 = float(n["time"])
        horizon = t0 + detect_within_s
        nxt = [float(o["time"]) for o in onsets
               if o["bed_id"] == n["bed_id"] and float(o["time"]) > t0]
        if nxt:
            horizon = min(horizon, min(nxt))
        cut_by_end = False
        if b is not None and b.end is not None:
            cut_by_end = b.end < horizon
            horizon = min(horizon, max(b.end, t0))
        phys = [p for p in by_bed.get(n["bed_id"], []) if p.category == "physiological"]
        active = sorted({p.rule for p in phys
                         if p.start < t0 and (p.end is None or p.end > t0)})
        first = min((p for p in phys if t0 <= p.start <= horizon),
                    key=lambda p: p.start, default=None)
        strong = None
        for p in phys:
            for t, pri in p.priorities:
                if t0 <= t <= horizon and RANK[pri] >= RANK["medium"]:
                    if strong is None or t < strong[0]:
                        strong = (t, p.rule, pri)
                    break
        events.append({
            "bed": b.key if b else str(n["bed_id"]),
            "onset": iso(t0),
            "text": n.get("text") or n.get("param") or "",
            "window_s": round(horizon - t0, 1),
            "detected": first is not None,
            # no alarm, but the recording ended before the window did: not judged
            "too_late": first is None and cut_by_end,
            "delay_s": round(first.start - t0, 1) if first is not None else None,
            "rule": first.rule if first is not None else None,
            "priority": first.raised_priority if first is not None else None,
            "delay_medium_or_high_s": round(strong[0] - t0, 1) if strong else None,
            "rule_medium_or_high": strong[1] if strong else None,
            "active_at_onset": active,
        })
    detected = [e["delay_s"] for e in events if e["detected"]]
    detection = {
        "events": events,
        "detected": len(detected),
        "missed": sum(1 for e in events if not e["detected"] and not e["too_late"]),
        "too_late": sum(1 for e in events if e["too_late"]),
        "median_delay_s": round(statistics.median(detected), 1) if detected else None,
        "max_delay_s": max(detected) if detected else None,
        "within_s": detect_within_s,
    }

    n = len(periods)
    return {
        "beds": sum(1 for b in beds.values() if b.span_s > 0),
        "bed_days": round(bed_days, 6),
        "alarms": n,
        "alarms_per_bed_day": _per_day(n, bed_days),
        "by_priority": {q: {"alarms": by_priority[q],
                            "per_bed_day": _per_day(by_priority[q], bed_days)}
                        for q in PRIORITIES},
        "by_category": by_category,
        "escalated": escalated,
        "open_at_end": open_n,
        "alarm_hours": _hours(total_s),
        "alarm_hours_per_bed_day": _per_day(total_s / 3600.0, bed_days),
        "state_share": state_share,
        "rules": rule_list,
        "acknowledgements": acks,
        "detection": detection,
    }


def bed_counts(bed: BedInfo, periods: list[AlarmPeriod], info: list[InfoEvent],
               bed_notes: list[dict[str, Any]], t0: float | None, t1: float | None
               ) -> dict[str, Any]:
    """A bed's line in the unit overview: alarms by highest priority, technical alarms,
    alarm-hours, notes, deterioration onsets and fluid-challenge results in [t0, t1]."""
    a = bed.start if t0 is None else t0
    b = bed.end if t1 is None else t1
    c: dict[str, Any] = {"high": 0, "medium": 0, "low": 0, "technical": 0, "hours": 0.0,
                         "t0": a, "span": (b - a) if a is not None and b is not None else 0}
    if a is None or b is None:
        c.update(notes=0, onsets=0, fluid=0)
        return c
    end = bed.end or b
    for p in periods:
        if p.start > b or p.end_or(end) < a:
            continue
        if p.category == "technical":
            c["technical"] += 1
        else:
            c[p.peak_priority] += 1
        c["hours"] += (min(p.end_or(end), b) - max(p.start, a)) / 3600
    ns = [n for n in bed_notes if a <= n["time"] <= b]
    c["notes"] = len(ns)
    c["onsets"] = sum(1 for n in ns if n["kind"] == "deterioration_onset")
    c["fluid"] = sum(1 for e in info if e.rule == "fluid_challenge"
                     and e.transition == "result" and a <= e.time <= b)
    return c
