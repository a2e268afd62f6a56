"""Delayed conditions: how a limit or pattern that holds turns into an alarm, and ends.

A condition has levels (0 = absent, 1 = base, 2.. = stronger tiers). Level k *matures* when
it has held without a break for the rule's delay (the IEC 60601-1-8 alarm condition delay);
the condition *ends* when the level has been 0 for the clear delay. Maturing and ending are
checked on every evaluation and on a timer set at the due time, so a delay also matures
between samples (for an intermittent value) while the last evaluation is recent enough
(``alarms.tick_maturation_max_age_s``). The timer fires on the bed's first message at or
after the due time (in event time, before that message's values are evaluated) or on the
clock tick, whichever comes first. A delay is met when the time elapsed is at least the
delay less :data:`.common.DELAY_TOLERANCE_S` (half a millisecond: see there).

Pure: no I/O, no clock.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from ..alarms import Category, Priority, RuleEvent
from .common import DELAY_TOLERANCE_S, NINF
from .state import BedState, Shared

__all__ = ["Spec", "Cond", "Conditions"]


@dataclass(frozen=True, slots=True)
class Spec:
    """How a delayed condition turns into an alarm."""

    rule: str
    #: priority per level (index 0: level 1)
    priorities: tuple[Priority, ...]
    category: Category
    delay_s: float
    clear_delay_s: float
    #: None: by priority (alarms.latching)
    latching: bool | None
    message: str


class Cond:
    """A condition with levels (0 = absent, 1 = base, 2.. = tiers) and an onset delay.

    ``onsets[k]`` is the time since which the level has been at least k without a break;
    level k matures when it has held for the delay. The condition ends when the level has
    been 0 for the clear delay.
    """

    __slots__ = ("onsets", "clear_since", "level", "last_t", "value", "details", "raised")

    def __init__(self, levels: int) -> None:
        self.onsets: list[float | None] = [None] * (levels + 1)
        self.clear_since: float | None = None
        self.level = 0
        self.last_t = NINF
        self.value: float | None = None
        self.details: dict = {}
        self.raised = 0          # highest level raised while the alarm condition is present

    def update(self, t: float, level: int) -> list[int]:
        """Record the level at ``t``; return the levels whose onset is new."""
        self.last_t = t
        self.level = level
        started = []
        on = self.onsets
        for k in range(1, len(on)):
            if level >= k:
                if on[k] is None:
                    on[k] = t
                    started.append(k)
            else:
                on[k] = None
        if level == 0:
            if self.clear_since is None:
                self.clear_since = t
        else:
            self.clear_since = None
        return started

    def matured(self, now: float, delay: float) -> int:
        on = self.onsets
        for k in range(len(on) - 1, 0, -1):
            s = on[k]
            if s is not None and now - s >= delay - DELAY_TOLERANCE_S:
                return k
        return 0


class Conditions:
    """Updates the conditions of a bed and reports their alarms to the alarm book."""

    def __init__(self, sh: Shared) -> None:
        self.sh = sh

    def update(self, b: BedState, spec: Spec, t: float, level: int, value: float | None,
               details: dict, ev: list[RuleEvent]) -> None:
        """The rule evaluated to ``level`` at ``t``."""
        c = b.conds.get(spec.rule)
        if c is None:
            c = b.conds[spec.rule] = Cond(len(spec.priorities))
        prev_level = c.level
        started = c.update(t, level)
        c.value = value
        c.details = details
        if spec.delay_s > 0:
            for k in started:
                self.sh.schedule(t + spec.delay_s, "cond", b.key, spec.rule, b.timers)
        if level == 0 and prev_level != 0 and c.raised and spec.clear_delay_s > 0:
            self.sh.schedule(t + spec.clear_delay_s, "cond", b.key, spec.rule, b.timers)
        self.outcome(b, spec, c, t, ev)

    def outcome(self, b: BedState, spec: Spec, c: Cond, now: float,
                ev: list[RuleEvent]) -> None:
        m = c.matured(now, spec.delay_s)
        if m > 0:
            if m > c.raised:
                c.raised = m
            pri = spec.priorities[c.raised - 1]
            ev += self.sh.book.condition(b.key, spec.rule, now, pri, spec.category, c.value,
                                         c.details, latching=spec.latching,
                                         message=spec.message)
        elif c.raised and c.level == 0 and c.clear_since is not None \
                and now - c.clear_since >= spec.clear_delay_s - DELAY_TOLERANCE_S:
            c.raised = 0
            ev += self.sh.book.condition_ended(b.key, spec.rule, now, c.value, c.details)

    def on_timer(self, b: BedState, rule: str, now: float, ev: list[RuleEvent],
                 spec_for: Callable[[BedState, str], Spec | None]) -> None:
        c = b.conds.get(rule)
        if c is None or now - c.last_t > self.sh.cfg.alarms.tick_maturation_max_age_s:
            return
        spec = spec_for(b, rule)
        if spec is not None:
            self.outcome(b, spec, c, now, ev)

    @staticmethod
    def cleared(b: BedState, rule: str) -> None:
        """The rule's alarm was cleared by a person: a new onset starts from level 0."""
        c = b.conds.get(rule)
        if c is not None:
            c.raised = 0
