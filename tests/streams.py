"""Hand-made value streams for the rules engine, shared by the rules and alarm tests.

:func:`stream` feeds ``fn(t)`` at a fixed step, one ``on_values`` per step (all values new,
none not valid) followed by a clock tick half a step later, as the replay does; it returns
every event in order. Bind a test module's bed and device with ``functools.partial``.
"""

from __future__ import annotations

from typing import Callable

from hemostream.core.alarms import RuleEvent


def stream(eng, start: float, end: float, fn: Callable[[float], dict[str, float] | None], *,
           bed: str, device: str, tick: bool = True, step: float = 1.0) -> list[RuleEvent]:
    """Feed ``fn(t)`` for ``t = start, start + step, ...`` below ``end`` (a falsy result sends
    nothing at that step); tick at ``t + 0.5`` unless ``tick`` is False."""
    out: list[RuleEvent] = []
    k = 0
    while start + k * step < end:
        t = start + k * step
        v = fn(t)
        if v:
            out += eng.on_values(bed, t, v, frozenset(v), {}, device)
        if tick:
            out += eng.tick(t + 0.5)
        k += 1
    return out


def of_rule(evs: list[RuleEvent], rule: str) -> list[RuleEvent]:
    """The events of one rule."""
    return [e for e in evs if e.rule == rule]


def transitions(evs: list[RuleEvent], rule: str | None = None) -> list[str]:
    """The transitions, in order (of one rule, or of all)."""
    return [e.transition for e in evs if rule is None or e.rule == rule]
