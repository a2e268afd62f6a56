"""Times and events in words, as the pages and figures show them."""

from __future__ import annotations

from datetime import datetime, timezone
from typing import Any

from ..core.display import fmt_value
from ..core.processor import epoch
from ..core.rules.phrases import phrase
from .periods import RANK, AlarmPeriod, InfoEvent


def parse_time(text: str, option: str = "time") -> float:
    try:
        t = datetime.fromisoformat(text.replace("Z", "+00:00") if text.endswith("Z") else text)
    except ValueError:
        raise ValueError(f"{option} {text!r}: expected an RFC 3339 time such as "
                         "2026-12-01T08:00:00Z") from None
    if t.tzinfo is None:
        raise ValueError(f"{option} {text!r}: give a UTC offset, e.g. 2026-12-01T08:00:00Z")
    return epoch(t)


def hhmmss(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).strftime("%H:%M:%S")


def when(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).strftime("%Y-%m-%d %H:%M:%SZ")


def span_text(s: float) -> str:
    s = int(round(s))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {s % 3600 // 60:02d} min"


def alarm_hover(p: AlarmPeriod, end: float, pri: str | None = None) -> str:
    seg = p.end_or(end)
    parts = [f"{phrase(p.rule)} ({pri or p.peak_priority} priority, {p.category})",
             f"{when(p.start)} to {when(seg) if p.end is not None else 'still active at ' + when(seg)}"
             f" ({span_text(seg - p.start)})"]
    if p.message:
        parts.append(p.message)
    for t, by in p.acks:
        parts.append(f"acknowledged {hhmmss(t)}" + (f" by {by}" if by else ""))
    if p.escalated:
        parts.append("escalated to high priority")
    if p.clear_reason:
        parts.append(f"cleared: {p.clear_reason}")
    return "\n".join(parts)


def note_hover(n: dict[str, Any]) -> str:
    parts = [f"{n['kind']} at {when(n['time'])}"]
    if n.get("param"):
        parts.append(f"channel {n['param']}")
    if n.get("volume_ml") is not None:
        parts.append(f"{n['volume_ml']:g} mL"
                     + (f" over {n['over_min']:g} min" if n.get("over_min") is not None else ""))
    if n.get("duration_s") is not None:
        parts.append(f"lasting {n['duration_s']:g} s")
    if n.get("text"):
        parts.append(n["text"])
    if n.get("by"):
        parts.append(f"by {n['by']}")
    return "\n".join(parts)


def fluid_text(e: InfoEvent) -> str:
    d = e.details
    out = d.get("outcome", "result")
    if out in ("responsive", "not_responsive"):
        s = (f"{out.replace('_', ' ')}: {d.get('param')} {d.get('change_pct', 0):+.0f} %")
        if d.get("cvp_change") is not None:
            s += f", CVP {d['cvp_change']:+.1f}"
        return s
    return f"not evaluable: {d.get('reason', '')}"


#: a resting adult's usual range (handbook ranges, from memory: SV about 60-100 mL, CO about
#: 4-8 L/min); a baseline under this part of the low end makes a percentage change large
#: for a small absolute one
LOW_BASELINE = {"SV": 40.0, "CO": 2.5}
#: responders to 250-500 mL typically rise by 10-30 % (common practice, from memory); a
#: rise beyond this is more than a bolus alone usually explains
LARGE_CHANGE_PCT = 100.0


def fluid_remarks(e: InfoEvent, periods: list[AlarmPeriod]) -> list[str]:
    """What qualifies a fluid-challenge result: a very low baseline, a change larger than a
    bolus alone explains, a window cut short, or physiological alarms at medium or high
    priority during the evaluation (bleeding, an unstable bed: the change may owe to the
    bed's course, not the fluid)."""
    d = e.details
    out: list[str] = []
    if d.get("outcome") not in ("responsive", "not_responsive"):
        return out
    param, base, change = d.get("param"), d.get("baseline"), d.get("change_pct")
    if isinstance(base, int | float) and param in LOW_BASELINE and base < LOW_BASELINE[param]:
        unit = "mL" if param == "SV" else "L/min"
        out.append(f"baseline {param} {fmt_value(param, base)} {unit} was very low: a small "
                   "rise is a large percentage")
    if isinstance(change, int | float) and abs(change) > LARGE_CHANGE_PCT:
        out.append(f"a change of {change:+.0f} % is more than a bolus alone usually explains")
    if d.get("note"):
        out.append(str(d["note"]))
    t0, t1 = d.get("bolus_time"), d.get("window_end") or e.time
    if isinstance(t0, int | float):
        unstable = sorted({phrase(p.rule) for p in periods
                           if p.category == "physiological" and _active_s(p, t0, t1) > 0})
        if unstable:
            out.append("alarms during the evaluation (" + ", ".join(unstable) + "): the "
                       "change may owe to the bed's course (bleeding, drugs), not the fluid "
                       "alone")
    return out


def _active_s(p: AlarmPeriod, t0: float, t1: float) -> float:
    """Seconds in [t0, t1] during which ``p``'s condition was present at medium or high
    priority (a latched alarm whose condition was over does not count)."""
    total = 0.0
    for a, b, pri in p.segments(t1):
        if RANK[pri] < RANK["medium"]:
            continue
        lo, hi = max(a, t0), min(b, t1)
        if hi <= lo:
            continue
        total += hi - lo
        for la, lb in p.latched_spans(t1):
            total -= max(0.0, min(hi, lb) - max(lo, la))
    return total

