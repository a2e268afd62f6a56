"""Alarm lifecycle with IEC 60601-1-8 semantics; the transition names are the project's own.

IEC 60601-1-8 (general requirements for alarm systems in medical electrical equipment) gives
the concepts: alarm conditions of high / medium / low priority, physiological versus
technical conditions, the alarm condition delay, latching and non-latching alarm signals,
the acknowledged and audio-paused states. This module keeps one record per active alarm and
turns what the rules report into lifecycle events (:class:`RuleEvent`):

==================  ==========================================================================
transition          when
==================  ==========================================================================
``raised``          a condition held for its delay and the bed has no active alarm of the rule
``updated``         the alarm is still active and its priority rose (a stronger tier), its
                    condition came back (latched alarm), or what it lists changed (technical)
``escalated``       a medium alarm still present and not acknowledged for
                    ``escalate_medium_after_s``: it becomes high priority (and latches)
``acknowledged``    a person acknowledged it (``by`` says who); audio silent for
                    ``acknowledge_s`` or until the condition ends
``audio_paused``    a person paused its audio for ``audio_pause_s``
``reannounced``     an acknowledgement or audio pause ran out and the alarm is still there
``condition_ended`` the condition no longer holds; a latching alarm stays (``latched``) until
                    acknowledged, a non-latching one is cleared right after
``cleared``         the alarm is gone (condition ended and not held, acknowledged while
                    latched, a technical alarm acknowledged, or the patient discharged)
``opened``          information: a fluid-challenge evaluation began
``result``          information: a fluid-challenge result
``profile``         information: the hemodynamic profile read-out changed
==================  ==========================================================================

De-duplication: one active alarm per (bed, rule); a recurrence while it is active updates it.
Alarm ids are ``<rule>@<bed>#<n>``, ``n`` counting per bed and rule from 1 for the engine's
lifetime (deterministic; never random).

Safety: this is a secondary display and notification aid, not a medical device. The bedside
monitor stays the primary alarm source; an alarm missed or delayed here must never be the
only one.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Annotated, Any, Callable, Final, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator

#: alarm priorities (IEC 60601-1-8), as configured on a rule
Priority = Literal["high", "medium", "low"]
#: priority of a lifecycle event: an alarm priority, or ``info`` for information results
EventPriority = Literal["high", "medium", "low", "info"]
Category = Literal["physiological", "technical", "information"]
#: lifecycle transitions (see the table above) and information results
Transition = Literal["raised", "updated", "escalated", "acknowledged", "audio_paused",
                     "reannounced", "condition_ended", "cleared", "opened", "result",
                     "profile"]
#: the one ordering of priorities (higher is more urgent); the dashboard imports it too
PRIORITY_RANK: Final[dict[str, int]] = {"info": 0, "low": 1, "medium": 2, "high": 3}


EscalateCategory = Literal["physiological", "technical"]
_LATCHING: dict[Priority, bool] = {"high": True, "medium": False, "low": False}
_ESCALATE: list[EscalateCategory] = ["physiological"]


class AlarmConfig(BaseModel):
    """Alarm lifecycle (IEC 60601-1-8 terms: priority, latching, acknowledged, audio paused).

    The ``[rules.alarms]`` table; :mod:`.rules.config` re-exports it with the other slices.
    """

    model_config = ConfigDict(extra="forbid")
    #: whether an alarm of a priority stays after its condition ended, until acknowledged
    latching: dict[Priority, bool] = Field(default_factory=lambda: _LATCHING.copy())
    #: an acknowledged alarm whose condition is still present is announced again after this
    #: (None: stays silent until the condition ends)
    acknowledge_s: Annotated[float, Field(gt=0)] | None = 600.0
    #: audio pause length; an alarm still present afterwards is announced again
    audio_pause_s: Annotated[float, Field(gt=0)] = 120.0
    #: a medium alarm still present and not acknowledged this long becomes high priority
    #: (None: no escalation)
    escalate_medium_after_s: Annotated[float, Field(gt=0)] | None = 600.0
    escalate_categories: list[EscalateCategory] = Field(default_factory=lambda: list(_ESCALATE))
    #: acknowledging a technical alarm clears it, and its silent feeds or devices are not
    #: watched again until they send (a removed line is not announced every few minutes)
    acknowledge_clears_technical: bool = True
    #: a condition delay matures on a clock tick (without a new sample) only if the last
    #: evaluation of the condition is at most this old
    tick_maturation_max_age_s: Annotated[float, Field(gt=0)] = 120.0

    @field_validator("latching")
    @classmethod
    def _all(cls, v: dict[str, bool]) -> dict[str, bool]:
        full = {"high": True, "medium": False, "low": False}
        full.update(v)
        return full


@dataclass(frozen=True, slots=True)
class RuleEvent:
    """One lifecycle transition or information result, as stored and published."""

    time: float
    bed: str
    alarm_id: str
    rule: str
    priority: EventPriority
    category: Category
    transition: Transition
    value: float | None = None
    details: dict[str, Any] = field(default_factory=dict)
    by: str | None = None

    def as_row(self) -> dict[str, Any]:
        return {"time": self.time, "bed": self.bed, "alarm_id": self.alarm_id,
                "rule": self.rule, "priority": self.priority, "category": self.category,
                "transition": self.transition, "value": self.value,
                "details": dict(self.details), "by": self.by}


class CommandError(Exception):
    """A command that addresses no active alarm of the bed (the reason says why)."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


class Alarm:
    """State of one active alarm."""

    __slots__ = ("id", "bed", "rule", "priority", "category", "latching", "since", "value",
                 "details", "signature", "present", "acknowledged", "acknowledged_by",
                 "ack_until", "paused_until", "escalated", "message", "unacked_since",
                 "last_t")

    def __init__(self, aid: str, bed: str, rule: str, priority: Priority, category: Category,
                 latching: bool, since: float, value: float | None, details: dict,
                 signature: Any, message: str) -> None:
        self.id = aid
        self.bed = bed
        self.rule = rule
        self.priority = priority
        self.category = category
        self.latching = latching
        self.since = since
        self.value = value
        self.details = details
        self.signature = signature
        self.present = True           # the condition holds
        self.acknowledged = False
        self.acknowledged_by: str | None = None
        self.ack_until: float | None = None
        self.paused_until: float | None = None
        self.escalated = False
        self.message = message
        self.unacked_since = since
        self.last_t = since           # time of its latest event: none goes before it

    def as_dict(self) -> dict[str, Any]:
        return {"id": self.id, "rule": self.rule, "priority": self.priority,
                "category": self.category, "message": self.message, "since": self.since,
                "value": self.value, "condition_present": self.present,
                "latched": self.latching and not self.present,
                "acknowledged": self.acknowledged, "acknowledged_by": self.acknowledged_by,
                "audio_paused_until": self.paused_until, "escalated": self.escalated,
                "details": self.details}


#: schedule(due_time, kind, bed, alarm_id) -> None; the engine calls back on_timer at due
Scheduler = Callable[[float, str, str, str], None]


class AlarmBook:
    """Active alarms of all beds, and their lifecycle."""

    def __init__(self, cfg: AlarmConfig, schedule: Scheduler) -> None:
        self.cfg = cfg
        self._schedule = schedule
        self._active: dict[str, dict[str, Alarm]] = {}     # bed -> rule -> alarm
        self._count: dict[tuple[str, str], int] = {}        # (bed, rule) -> ids issued

    # ------------------------------------------------------------------ queries

    def get(self, bed: str, rule: str) -> Alarm | None:
        d = self._active.get(bed)
        return d.get(rule) if d else None

    def active(self, bed: str) -> list[Alarm]:
        d = self._active.get(bed)
        if not d:
            return []
        return sorted(d.values(), key=lambda a: (-PRIORITY_RANK[a.priority], a.since, a.id))

    def find(self, bed: str, key: str) -> Alarm | None:
        d = self._active.get(bed)
        if not d:
            return None
        if key in d:
            return d[key]
        for a in d.values():
            if a.id == key:
                return a
        return None

    def seed_ids(self, counts: dict[tuple[str, str], int]) -> None:
        """Go on numbering alarm ids after ``counts`` ((bed, rule) -> the last n used), e.g.
        those already stored by another process, so a resumed book never reuses an id."""
        for key, n in counts.items():
            self._count[key] = max(self._count.get(key, 0), n)

    def _next_id(self, bed: str, rule: str) -> str:
        n = self._count.get((bed, rule), 0) + 1
        self._count[(bed, rule)] = n
        return f"{rule}@{bed}#{n}"

    def _ev(self, a: Alarm, t: float, transition: Transition, by: str | None = None,
            details: dict | None = None) -> RuleEvent:
        # an alarm's events keep their order in time: a condition can be seen to end on a
        # measurement timed before the clock tick that raised it (a feed that comes back)
        t = a.last_t = max(t, a.last_t)
        return RuleEvent(t, a.bed, a.id, a.rule, a.priority, a.category, transition, a.value,
                         dict(a.details if details is None else details), by)

    # ------------------------------------------------------------------ from the rules

    def condition(self, bed: str, rule: str, t: float, priority: Priority, category: Category,
                  value: float | None, details: dict, *, latching: bool | None = None,
                  signature: Any = None, message: str = "") -> list[RuleEvent]:
        """The rule's condition holds (its delay has passed) at ``priority``."""
        a = self.get(bed, rule)
        if a is None:
            lat = self.cfg.latching[priority] if latching is None else latching
            a = Alarm(self._next_id(bed, rule), bed, rule, priority, category, lat, t, value,
                      details, signature, message)
            self._active.setdefault(bed, {})[rule] = a
            self._arm_escalation(a, t)
            return [self._ev(a, t, "raised")]
        out: list[RuleEvent] = []
        a.value = value
        reasons = []
        if not a.present:
            a.present = True
            reasons.append("condition_returned")
        if PRIORITY_RANK[priority] > PRIORITY_RANK[a.priority]:
            a.priority = priority
            if self.cfg.latching[priority]:
                a.latching = True
            reasons.append("priority_raised")
        if signature != a.signature:
            a.signature = signature
            reasons.append("changed")
        if reasons:
            a.details = details
            out.append(self._ev(a, t, "updated", details={**details, "reason": reasons}))
            if "condition_returned" in reasons:
                self._arm_escalation(a, t)
        return out

    def condition_ended(self, bed: str, rule: str, t: float, value: float | None = None,
                        details: dict | None = None) -> list[RuleEvent]:
        a = self.get(bed, rule)
        if a is None or not a.present:
            return []
        a.present = False
        if value is not None:
            a.value = value
        if details:
            a.details = {**a.details, **details}
        out = [self._ev(a, t, "condition_ended")]
        if not a.latching or a.acknowledged:
            out.append(self._clear(a, t, "condition_ended"))
        return out

    def _clear(self, a: Alarm, t: float, reason: str, by: str | None = None) -> RuleEvent:
        del self._active[a.bed][a.rule]
        if not self._active[a.bed]:
            del self._active[a.bed]
        return self._ev(a, t, "cleared", by=by, details={**a.details, "reason": reason})

    def clear_bed(self, bed: str, t: float, reason: str) -> list[RuleEvent]:
        return [self._clear(a, t, reason) for a in self.active(bed)]

    def clear_rule(self, bed: str, rule: str, t: float, reason: str) -> list[RuleEvent]:
        a = self.get(bed, rule)
        return [] if a is None else [self._clear(a, t, reason)]

    def _arm_escalation(self, a: Alarm, t: float) -> None:
        """Start the escalation clock: present and not acknowledged since ``t``."""
        a.unacked_since = t
        after = self.cfg.escalate_medium_after_s
        if (after is not None and a.priority == "medium"
                and a.category in self.cfg.escalate_categories):
            self._schedule(t + after, "escalate", a.bed, a.id)

    # ------------------------------------------------------------------ from people

    def acknowledge(self, bed: str, t: float, key: str, by: str) -> list[RuleEvent]:
        a = self._must(bed, key)
        a.acknowledged = True
        a.acknowledged_by = by
        out = [self._ev(a, t, "acknowledged", by=by)]
        if not a.present:
            out.append(self._clear(a, t, "acknowledged", by=by))
        elif a.category == "technical" and self.cfg.acknowledge_clears_technical:
            out.append(self._clear(a, t, "acknowledged", by=by))
        elif self.cfg.acknowledge_s is not None:
            a.ack_until = t + self.cfg.acknowledge_s
            self._schedule(a.ack_until, "silence_end", bed, a.id)
        return out

    def pause_audio(self, bed: str, t: float, key: str, by: str) -> list[RuleEvent]:
        a = self._must(bed, key)
        a.paused_until = t + self.cfg.audio_pause_s
        self._schedule(a.paused_until, "silence_end", bed, a.id)
        return [self._ev(a, t, "audio_paused", by=by,
                         details={**a.details, "audio_paused_until": a.paused_until})]

    def _must(self, bed: str, key: str) -> Alarm:
        a = self.find(bed, key)
        if a is None:
            have = [x.id for x in self.active(bed)]
            raise CommandError(f"no active alarm {key!r} on bed {bed}"
                               + (f"; active: {', '.join(have)}" if have else
                                  "; the bed has no active alarm"))
        return a

    # ------------------------------------------------------------------ timers

    def on_timer(self, kind: str, bed: str, aid: str, now: float) -> list[RuleEvent]:
        a = self.find(bed, aid)
        if a is None or a.id != aid:
            return []
        if kind == "escalate":
            after = self.cfg.escalate_medium_after_s
            if (after is not None and a.present and a.priority == "medium"
                    and not a.acknowledged and now - a.unacked_since >= after - 1e-6):
                a.priority = "high"
                a.escalated = True
                if self.cfg.latching["high"]:
                    a.latching = True
                return [self._ev(a, now, "escalated",
                                 details={**a.details, "escalated_after_s": after})]
            return []
        if kind == "silence_end":
            ack_on = a.acknowledged and (a.ack_until is None or a.ack_until > now)
            pause_on = a.paused_until is not None and a.paused_until > now
            was_silenced = a.acknowledged or a.paused_until is not None
            if ack_on or pause_on or not was_silenced:
                return []
            a.acknowledged = False
            a.ack_until = None
            a.paused_until = None
            if a.present:
                self._arm_escalation(a, now)
            return [self._ev(a, now, "reannounced")]
        raise ValueError(f"unknown alarm timer {kind!r}")
