"""The rules layer's engine: takes the processor's inputs and dispatches them to the feature
modules (technical conditions, artifacts, trends, fluid challenge, limits, patterns, profile),
whose conditions feed the alarm lifecycle of :mod:`..alarms`.

Pure core: no I/O, no wall clock, no randomness. Time is passed in (float epoch seconds,
UTC): message times to :meth:`RulesEngine.on_values` and friends, and a clock to
:meth:`RulesEngine.tick` (event time in replay, wall clock live). The same inputs give the
same events, every time: nothing iterates a set of strings (whose order depends on the hash
seed); orders come from the configuration or from the arrival of inputs.

Every rule and default is documented in ``docs/rules.md`` and ``configs/rules.toml``.

Safety: this is a secondary display and notification aid, not a medical device; the bedside
monitor stays the primary alarm source. The pattern rules and the profile read-out are
prompts to look, never a diagnosis.

Cost: per ``on_values`` call, O(1) work per new value of a trended, limited or watched
parameter, plus the pattern rules whose inputs changed; a trend slope is recomputed only when
one of its buckets closes (see :mod:`..trends`). ``tick`` pops due timers from a heap (O(log
n) per timer) and never scans all beds.

Delay timers in event time: a bed's condition delays (onset and clear) and profile hold are
also on the bed's own heap, and :meth:`RulesEngine.on_values` fires those its message's time
has reached: the ones due before the message first, at their due time (the state of the
bed's earlier messages, as a tick at that moment would see it), the ones due at the message's
time (within :data:`.common.DELAY_TOLERANCE_S`) after its values, at its time. So the message
that completes a delay raises the alarm itself, in replay and live alike, instead of the next
clock tick (up to a second later); a timer fires once, from whichever heap pops it first.
"""

from __future__ import annotations

import heapq
from typing import Any, Mapping

from ..alarms import CommandError, RuleEvent
from .artifacts import ArtifactDetector
from .common import ARTIFACT, DELAY_TOLERANCE_S
from .conditions import Conditions, Spec
from .config import RulesConfig
from .fluid import FluidChallenge
from .limits import Limits
from .patterns import Patterns
from .phrases import phrase
from .profile import PROFILE_TEXT, Profile, classify
from .state import BedState, Shared, Timer
from .technical import Technical
from .trending import Trending

__all__ = ["RulesEngine", "RuleEvent", "CommandError"]


class RulesEngine:
    """The rules layer behind the processor (see the module docstring and docs/rules.md).

    Satisfies :class:`.protocol.RulesLayer`.
    """

    def __init__(self, cfg: RulesConfig | None = None) -> None:
        self.cfg = cfg = cfg or RulesConfig()
        self._sh = sh = Shared(cfg)
        self.book = sh.book
        self._beds: dict[str, BedState] = {}
        self.art = ArtifactDetector(cfg.artifacts)
        self.trending = Trending(cfg)
        self.conditions = Conditions(sh)
        self.limits = Limits(cfg, self.conditions)
        self.patterns = Patterns(cfg, self.trending, self.conditions)
        self.technical = Technical(sh, self.art)
        self.fluid = FluidChallenge(sh)
        self.profile = Profile(sh, self.trending)
        #: configured pattern messages: the phrase of a rule the phrase table does not know
        self._messages = {rid: p.message for rid, p in cfg.patterns.items() if p.message}

    # ================================================================== plumbing

    def _bed(self, bed: str) -> BedState:
        b = self._beds.get(bed)
        if b is None:
            b = self._beds[bed] = BedState(bed, self.limits.defaults)
        return b

    def bed_state(self, bed: str) -> BedState | None:
        """The engine's state of one bed (None before its first input), for inspection."""
        return self._beds.get(bed)

    def beds(self) -> list[str]:
        return list(self._beds)

    def _spec_for(self, b: BedState, rule: str) -> Spec | None:
        for lim in b.limits:
            if lim.rule == rule:
                return lim.spec
        return self.patterns.spec(rule)

    # ================================================================== inputs

    def on_values(self, bed: str, t: float, fresh: dict[str, float], new: frozenset[str],
                  nonvalid: dict[str, str], device: str,
                  times: Mapping[str, float] | None = None,
                  rx: float | None = None) -> list[RuleEvent]:
        """One accepted observation message, after derivations (see docs/rules.md).

        ``times``: measurement time of the new values where it differs from ``t`` (an
        intermittent measurement is older than its message); missing names are at ``t``.
        ``rx``: its arrival on the clock ``tick`` is given (how far the bed's data lags it:
        a tick settles the bed's delays only once its data has reached them)."""
        if not self.cfg.enabled:
            return []
        b = self._beds.get(bed) or self._bed(bed)
        ev: list[RuleEvent] = []
        timers = b.timers
        # the bed's delay timers due before this message fire first, at their due time, on
        # what the bed's earlier messages showed (as a clock tick at that moment would)
        if timers and timers[0].due < t - DELAY_TOLERANCE_S:
            self._due(b, t - DELAY_TOLERANCE_S, None, ev)
        if t >= b.last_t and rx is not None:
            b.lag = rx - t if rx > t else 0.0
        if t > b.last_t:
            b.last_t = t
        clock = self._sh.clock
        seen = t if t > clock else clock
        self.technical.on_values(b, t, seen, new, nonvalid, device, ev)
        excluded = self.art.check(b.art, t, fresh, new, nonvalid)
        if b.art.sig_since or self.book.get(bed, ARTIFACT) is not None:
            ev += self.technical.artifact_alarm(b, t)
        changed = self.trending.feed(b, t, fresh, new, excluded)
        self.fluid.on_values(b, t, fresh, new, excluded, ev, times)
        self.limits.evaluate(b, t, fresh, new, excluded, ev)
        self.patterns.evaluate(b, t, fresh, new, changed, excluded, ev)
        self.profile.on_values(b, t, fresh, new, changed, excluded, ev)
        # those due at this message's time (within the tolerance) after it: a condition this
        # message evaluated has matured or not already; one it did not evaluate (another
        # parameter's, an intermittent value's) matures here, not at the next clock tick
        if timers and timers[0].due <= t + DELAY_TOLERANCE_S:
            self._due(b, t + DELAY_TOLERANCE_S, t, ev)
        return ev

    def on_note(self, bed: str, t: float, kind: str, volume_ml: float | None = None,
                over_min: float | None = None, param: str | None = None,
                duration_s: float | None = None) -> list[RuleEvent]:
        if not self.cfg.enabled:
            return []
        ev: list[RuleEvent] = []
        if kind in self.cfg.artifacts.trend_reset_note_kinds:
            b = self._bed(bed)
            for p in self.art.affected(self.art.channels_for(param)):
                tr = b.trends.get(p)
                if tr is not None:
                    tr.reset()
        if self.cfg.fluid_challenge.enabled:
            self.fluid.note(self._bed(bed), t, kind, param)
        if kind in self.cfg.artifacts.note_kinds:
            b = self._bed(bed)
            chs = self.art.note(b.art, t, param, duration_s, kind)
            for p in self.art.affected(chs):
                tr = b.trends.get(p)
                if tr is not None:
                    tr.drop_since(t)
            if self.book.get(bed, ARTIFACT) is not None:
                ev += self.technical.artifact_alarm(b, t)
        elif kind == "fluid_bolus":
            b = self._bed(bed)
            over = self.cfg.fluid_challenge.default_over_min if over_min is None else over_min
            b.fluid_until = max(b.fluid_until, t + float(over) * 60.0)
            if self.cfg.fluid_challenge.enabled:
                ev += self.fluid.open(b, t, volume_ml, over_min)
        return ev

    def on_admit(self, bed: str, t: float, limits: dict[str, dict[str, float]] | None = None,
                 discharged: bool = False) -> list[RuleEvent]:
        if not self.cfg.enabled:
            return []
        if discharged:
            ev = self.book.clear_bed(bed, t, "discharged")
            self._beds.pop(bed, None)
            return ev
        self.limits.admit(self._bed(bed), limits)
        return []

    def on_command(self, bed: str, t: float, action: str, alarm: str,
                   by: str) -> list[RuleEvent]:
        """Acknowledge or pause the audio of one active alarm (by alarm id or rule id)."""
        if action == "acknowledge":
            a = self.book.find(bed, alarm)
            ev = self.book.acknowledge(bed, t, alarm, by)
            b = self._beds.get(bed)
            if a is not None and a.category == "technical" \
                    and self.cfg.alarms.acknowledge_clears_technical and b is not None:
                self.technical.acknowledged(b, a.rule)
            for e in ev:
                if e.transition == "cleared" and b is not None:
                    self.conditions.cleared(b, e.rule)
            return ev
        if action == "pause_audio":
            return self.book.pause_audio(bed, t, alarm, by)
        raise CommandError(f"unknown action {action!r}; expected acknowledge or pause_audio")

    # ================================================================== clock

    def tick(self, now: float) -> list[RuleEvent]:
        """Advance time-driven conditions to ``now`` (silent feeds and devices, delays that
        mature without a new sample, pause and acknowledgement expiry, escalation, the end of
        fluid-challenge windows)."""
        sh = self._sh
        if now > sh.clock:
            sh.clock = now
        ev: list[RuleEvent] = []
        if not self.cfg.enabled:
            return ev
        heap = sh.heap
        while heap and heap[0].due <= now:
            tm = heapq.heappop(heap)
            real = tm.orig or tm
            if real.spent:
                continue
            at = now
            if real.local:
                # a delay runs in the bed's event time: when its messages arrive ``lag``
                # seconds after their own time (a backlog, a slow network), the clock is
                # ahead of what the bed has shown, and settling the delay now would judge a
                # condition whose end is still on its way. The bed's clock reaches the due
                # time at due + lag, unless its next message settles the delay first.
                b = self._beds.get(real.bed)
                lag = b.lag if b is not None else 0.0
                if lag > DELAY_TOLERANCE_S:
                    if real.due > now - lag:
                        sh.seq += 1
                        later = Timer(real.due + lag, sh.seq, real.kind, real.bed, real.key)
                        later.orig = real
                        heapq.heappush(heap, later)
                        continue
                    at = max(now - lag, real.due)
            real.spent = True
            self._fire(real, at, ev)
        return ev

    def _due(self, b: BedState, until: float, at: float | None, ev: list[RuleEvent]) -> None:
        """Fire the bed's delay timers due at or before ``until`` (event time), each at
        ``at``, or at its own due time when ``at`` is None."""
        timers = b.timers
        while timers and timers[0].due <= until:
            tm = heapq.heappop(timers)
            if not tm.spent:
                tm.spent = True
                self._fire(tm, tm.due if at is None else at, ev)

    def _fire(self, tm: Timer, now: float, ev: list[RuleEvent]) -> None:
        kind, bed, key = tm.kind, tm.bed, tm.key
        if kind in ("escalate", "silence_end"):
            ev += self.book.on_timer(kind, bed, key, now)
            return
        b = self._beds.get(bed)
        if b is None:
            return
        if kind == "feed":
            self.technical.feed_timer(b, key, now, ev)
        elif kind == "device":
            self.technical.device_timer(b, key, now, ev)
        elif kind == "cond":
            self.conditions.on_timer(b, key, now, ev, self._spec_for)
        elif kind == "notvalid":
            ev += self.technical.not_valid_alarm(b, now)
        elif kind == "fluid":
            ev += self.fluid.on_timer(b, key, now)
        elif kind == "profile":
            self.profile.on_timer(b, now, ev)

    # ================================================================== read-outs

    def phrase(self, rule: str) -> str:
        """The short phrase screens show for ``rule`` (see :mod:`.phrases`)."""
        return phrase(rule, self._messages)

    def _alarm_dicts(self, bed: str) -> list[dict[str, Any]]:
        return [{**a.as_dict(), "phrase": self.phrase(a.rule)} for a in self.book.active(bed)]

    def classify(self, levels: dict[str, float | None], cvp_rising: bool = False) -> str | None:
        """Profile read-out from levels of CVP, PAWP, CI and SVR (see :func:`.profile.classify`)."""
        return classify(self.profile.ranges, levels, cvp_rising)

    def bed_view(self, bed: str) -> dict[str, Any]:
        """Dashboard model of one bed (JSON-able)."""
        b = self._beds.get(bed)
        if b is None:
            return {"trends": {}, "alarms": [], "profile": None, "profile_text": None,
                    "fluid_challenge": None}
        return {"trends": self.trending.view(b),
                "alarms": self._alarm_dicts(bed),
                "profile": b.profile,
                "profile_text": PROFILE_TEXT.get(b.profile) if b.profile else None,
                "fluid_challenge": dict(b.fc_last) if b.fc_last else None,
                "fluid_challenge_open": b.fc is not None}

    def artifact_reasons(self, bed: str, t: float) -> dict[str, str]:
        """Parameters (measured and derived) the artifact detector holds out at ``t``, each
        with why: what makes a value's quality ``artifact`` (:mod:`..quality`)."""
        b = self._beds.get(bed)
        if b is None or not self.cfg.enabled:
            return {}
        return self.art.reasons(b.art, t)

    def trend_directions(self, bed: str) -> dict[str, str]:
        """Current trend direction per trended parameter that has one (cheap: for publishing
        with every derived message)."""
        b = self._beds.get(bed)
        if b is None:
            return {}
        return self.trending.directions(b)

    def alarm_state(self, bed: str) -> dict[str, Any]:
        """Current alarm state of the bed (retained on ``hemo/<unit>/<bed>/alarm``)."""
        act = self._alarm_dicts(bed)
        return {"alarms": act, "count": len(act),
                "highest": act[0]["priority"] if act else None}
