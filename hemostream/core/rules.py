"""The rules layer: trends, limit and pattern rules, fluid-challenge evaluation, hemodynamic
profile read-out and technical conditions, feeding the alarm lifecycle of :mod:`.alarms`.

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
one of its buckets closes (see :mod:`.trends`). ``tick`` pops due timers from a heap (O(log
n) per timer) and never scans all beds.
"""

from __future__ import annotations

import heapq
from typing import Any

from .alarms import AlarmBook, CommandError, RuleEvent
from .rules_artifacts import ArtifactDetector, ArtifactState
from .rules_config import LimitRule, PatternRule, RulesConfig, Term
from .trends import RobustTrend, TrendReading

__all__ = ["RulesEngine", "RuleEvent", "CommandError"]

_INF = float("inf")
_NINF = float("-inf")

#: rule ids of the technical conditions and the information read-outs
FEED_SILENT = "feed_silent"
DEVICE_SILENT = "device_silent"
NOT_VALID = "values_not_valid"
ARTIFACT = "artifact_suspected"
FLUID = "fluid_challenge"
PROFILE = "hemodynamic_profile"

PROFILE_TEXT = {
    "hypovolemic": "consistent with a hypovolemic pattern",
    "cardiogenic": "consistent with a cardiogenic pattern",
    "obstructive": "consistent with an obstructive pattern",
    "cardiogenic_or_obstructive": "consistent with a cardiogenic or obstructive pattern "
                                  "(no PAWP to tell them apart)",
    "distributive": "consistent with a distributive pattern",
}


def _median(vals: list[float]) -> float:
    s = sorted(vals)
    n = len(s)
    return s[n // 2] if n % 2 else 0.5 * (s[n // 2 - 1] + s[n // 2])


class _Spec:
    """How a delayed condition turns into an alarm."""

    __slots__ = ("rule", "priorities", "category", "delay_s", "clear_delay_s", "latching",
                 "message")

    def __init__(self, rule: str, priorities: tuple[str, ...], category: str, delay_s: float,
                 clear_delay_s: float, latching: bool | None, message: str) -> None:
        self.rule = rule
        self.priorities = priorities
        self.category = category
        self.delay_s = delay_s
        self.clear_delay_s = clear_delay_s
        self.latching = latching
        self.message = message


class _Cond:
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
        self.last_t = _NINF
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
            if s is not None and now - s >= delay - 1e-9:
                return k
        return 0


class _Limit:
    __slots__ = ("param", "side", "rule", "threshold", "hysteresis", "spec")

    def __init__(self, param: str, side: str, threshold: float, hysteresis: float,
                 spec: _Spec) -> None:
        self.param = param
        self.side = side
        self.rule = f"{param}_{side}"
        self.threshold = threshold
        self.hysteresis = hysteresis
        self.spec = spec


class _CTerm:
    """A pattern term with its parameter list resolved once."""

    __slots__ = ("params", "trend", "at_least", "below", "hysteresis", "level")

    def __init__(self, t: Term) -> None:
        self.params = tuple(t.params)
        self.trend = t.trend
        self.at_least = t.at_least
        self.below = t.below
        self.hysteresis = t.hysteresis
        self.level = t.at_least is not None or t.below is not None


class _Pattern:
    __slots__ = ("rule", "cfg", "spec", "trend_inputs", "level_inputs", "terms", "tiers")

    def __init__(self, rule: str, cfg: PatternRule) -> None:
        self.rule = rule
        self.cfg = cfg
        pri = (cfg.priority,) + tuple(t.priority for t in cfg.tiers)
        self.spec = _Spec(rule, pri, "physiological", cfg.delay_s, cfg.clear_delay_s,
                          cfg.latching, cfg.message or cfg.description)
        trend: dict[str, None] = {}
        level: dict[str, None] = {}
        for term in list(cfg.terms) + [t for tier in cfg.tiers for t in tier.terms]:
            for p in term.params:
                if term.trend is not None:
                    trend[p] = None
                if term.at_least is not None or term.below is not None:
                    level[p] = None
        self.trend_inputs = tuple(trend)
        # a pattern with trend terms is evaluated when one of its trends moves (once per
        # bucket); a pattern of levels only, whenever one of its levels is new
        self.level_inputs = tuple(level) if not trend else ()
        self.terms = tuple(_CTerm(t) for t in cfg.terms)
        self.tiers = tuple(tuple(_CTerm(t) for t in tier.terms) for tier in cfg.tiers)


class _Eval:
    """An open fluid-challenge evaluation."""

    __slots__ = ("id", "bolus_t", "volume_ml", "over_min", "param", "baseline", "cvp_baseline",
                 "win_start", "win_end", "vals", "cvp_vals")

    def __init__(self, aid: str, bolus_t: float, volume_ml: float | None, over_min: float,
                 param: str, baseline: float, cvp_baseline: float | None, win_start: float,
                 win_end: float) -> None:
        self.id = aid
        self.bolus_t = bolus_t
        self.volume_ml = volume_ml
        self.over_min = over_min
        self.param = param
        self.baseline = baseline
        self.cvp_baseline = cvp_baseline
        self.win_start = win_start
        self.win_end = win_end
        self.vals: list[float] = []
        self.cvp_vals: list[float] = []


class _Bed:
    __slots__ = ("key", "trends", "conds", "overrides", "limits", "art", "last_t",
                 "last_seen", "param_device", "feed_sched", "silent", "ignored",
                 "dev_last", "dev_sched", "dev_silent", "dev_ignored", "notvalid",
                 "fc", "fc_last", "profile", "cand", "cand_since", "cand_levels")

    def __init__(self, key: str, limits: list[_Limit]) -> None:
        self.key = key
        self.trends: dict[str, RobustTrend] = {}
        self.conds: dict[str, _Cond] = {}
        self.overrides: dict[str, dict[str, float]] = {}
        self.limits = limits
        self.art = ArtifactState()
        self.last_t = _NINF
        self.last_seen: dict[str, float] = {}
        self.param_device: dict[str, str] = {}
        self.feed_sched: dict[str, None] = {}
        self.silent: dict[str, float] = {}
        self.ignored: dict[str, None] = {}
        self.dev_last: dict[str, float] = {}
        self.dev_sched: dict[str, None] = {}
        self.dev_silent: dict[str, float] = {}
        self.dev_ignored: dict[str, None] = {}
        self.notvalid: dict[str, tuple[float, str]] = {}
        self.fc: _Eval | None = None
        self.fc_last: dict | None = None
        self.profile: str | None = None
        self.cand: str | None = None
        self.cand_since: float | None = None
        self.cand_levels: dict[str, float | None] = {}


class RulesEngine:
    """The rules layer behind the processor (see the module docstring and docs/rules.md)."""

    def __init__(self, cfg: RulesConfig | None = None) -> None:
        self.cfg = cfg = cfg or RulesConfig()
        self._heap: list[tuple[float, int, str, str, str]] = []
        self._seq = 0
        self.book = AlarmBook(cfg.alarms, self._schedule)
        self._beds: dict[str, _Bed] = {}
        self._clock = _NINF
        self._info_count: dict[tuple[str, str], int] = {}
        self.art = ArtifactDetector(cfg.artifacts)
        tc = cfg.trends
        self._trend_params = tuple(tc.params)
        self._trend_cfg = {p: (c.steady_abs, c.steady_rel) for p, c in tc.params.items()}
        self._limit_specs: dict[tuple[str, str], _Spec] = {}
        self._default_limits = self._build_limits({})
        self._limit_params = tuple(dict.fromkeys(lim.param for lim in self._default_limits))
        self._patterns = tuple(_Pattern(rid, p) for rid, p in cfg.patterns.items()
                               if p.enabled)
        # parameter -> indices of the patterns that read its trend / its level
        self._by_trend: dict[str, list[int]] = {}
        by_level: dict[str, list[int]] = {}
        trended = set(cfg.trends.params)
        for k, pat in enumerate(self._patterns):
            for p in pat.trend_inputs:
                self._by_trend.setdefault(p, []).append(k)
            for p in pat.level_inputs:
                # a trended level is read from its bucket points: new once per bucket
                if p in trended:
                    if k not in self._by_trend.setdefault(p, []):
                        self._by_trend[p].append(k)
                else:
                    by_level.setdefault(p, []).append(k)
        self._by_level = tuple(by_level.items())
        te = cfg.technical
        self._feed_after = dict(te.feed_silent_after_s)
        self._feed_params = tuple(te.feed_silent_after_s)
        self._nv_statuses = tuple(te.not_valid_statuses)
        pr = cfg.profile
        self._profile_inputs = ("CVP", "PAWP", "CI", "SVR")
        self._profile_ranges = {p: (s.low, s.high) for p, s in pr.ranges.items()}
        fc = cfg.fluid_challenge
        self._fc_params = tuple(fc.params)

    # ================================================================== configuration

    def _limit_spec(self, param: str, side: str, rule: LimitRule | None) -> _Spec:
        if rule is None:
            d = self.cfg.limit_defaults
            return _Spec(f"{param}_{side}", (d.priority,), "physiological", d.delay_s,
                         d.clear_delay_s, None, f"{param} {side}")
        key = (param, side)
        s = self._limit_specs.get(key)
        if s is None:
            pri = rule.low_priority if side == "low" else rule.high_priority
            s = _Spec(f"{param}_{side}", (pri,), "physiological", rule.delay_s,
                      rule.clear_delay_s, rule.latching, rule.description or f"{param} {side}")
            self._limit_specs[key] = s
        return s

    def _build_limits(self, overrides: dict[str, dict[str, float]]) -> list[_Limit]:
        out: list[_Limit] = []
        names = list(self.cfg.limits) + [p for p in overrides if p not in self.cfg.limits]
        for p in names:
            rule = self.cfg.limits.get(p)
            ov = overrides.get(p, {})
            for side in ("low", "high"):
                thr = ov.get(side, getattr(rule, side) if rule is not None else None)
                if thr is None:
                    continue
                hyst = rule.hysteresis if rule is not None else self.cfg.limit_defaults.hysteresis
                out.append(_Limit(p, side, float(thr), hyst, self._limit_spec(p, side, rule)))
        return out

    # ================================================================== plumbing

    def _schedule(self, due: float, kind: str, bed: str, key: str) -> None:
        self._seq += 1
        heapq.heappush(self._heap, (due, self._seq, kind, bed, key))

    def _bed(self, bed: str) -> _Bed:
        b = self._beds.get(bed)
        if b is None:
            b = self._beds[bed] = _Bed(bed, self._default_limits)
        return b

    def _info_id(self, bed: str, rule: str) -> str:
        n = self._info_count.get((bed, rule), 0) + 1
        self._info_count[(bed, rule)] = n
        return f"{rule}@{bed}#{n}"

    def beds(self) -> list[str]:
        return list(self._beds)

    # ================================================================== inputs

    def on_values(self, bed: str, t: float, fresh: dict[str, float], new: frozenset[str],
                  nonvalid: dict[str, str], device: str) -> list[RuleEvent]:
        """One accepted observation message, after derivations (see docs/rules.md)."""
        if not self.cfg.enabled:
            return []
        b = self._beds.get(bed) or self._bed(bed)
        ev: list[RuleEvent] = []
        if t > b.last_t:
            b.last_t = t
        seen = t if t > self._clock else self._clock

        # -- technical: device and feeds --------------------------------------------
        if device not in b.dev_sched:
            b.dev_sched[device] = None
            self._schedule(seen + self.cfg.technical.device_silent_after_s, "device", bed,
                           device)
        b.dev_last[device] = seen
        feed_changed = False
        if device in b.dev_silent or device in b.dev_ignored:
            b.dev_silent.pop(device, None)
            b.dev_ignored.pop(device, None)
            ev += self._device_alarm(b, t)
            feed_changed = True
        fa = self._feed_after
        for p in self._feed_params:
            if p in new:
                b.last_seen[p] = seen
                b.param_device[p] = device
                if p not in b.feed_sched:
                    b.feed_sched[p] = None
                    self._schedule(seen + fa[p], "feed", bed, p)
                if p in b.silent:
                    del b.silent[p]
                    feed_changed = True
                if p in b.ignored:
                    del b.ignored[p]
        if feed_changed:
            ev += self._feed_alarm(b, t)

        # -- technical: values not valid -----------------------------------------------
        if nonvalid:
            for p, s in nonvalid.items():
                if s in self._nv_statuses and p not in b.notvalid:
                    b.notvalid[p] = (t, s)
                    self._schedule(t + self.cfg.technical.not_valid_after_s, "notvalid", bed,
                                   p)
        if b.notvalid:
            gone = [p for p in b.notvalid if p in new]
            if gone:
                for p in gone:
                    del b.notvalid[p]
            ev += self._not_valid_alarm(b, t)

        # -- artifacts ------------------------------------------------------------------
        excluded = self.art.check(b.art, t, fresh, new, nonvalid)
        if b.art.sig_since or self.book.get(bed, ARTIFACT) is not None:
            ev += self._artifact_alarm(b, t)

        # -- trends ---------------------------------------------------------------------
        changed: list[str] = []
        tc = self.cfg.trends
        trends = b.trends
        for p in self._trend_params:
            if p in new and p not in excluded:
                tr = trends.get(p)
                if tr is not None and tr.open_start <= t < tr.open_end:
                    tr._bt.append(t)             # fast path: same bucket as the last sample
                    tr._bv.append(fresh[p])
                    continue
                if tr is None:
                    tr = trends[p] = RobustTrend(tc.window_s, tc.bucket_s, tc.min_points,
                                                 tc.min_span_fraction, tc.gap_reset_s,
                                                 tc.stale_after_s, tc.params[p].step_reset)
                if tr.update(t, fresh[p]):
                    changed.append(p)

        # -- fluid challenge --------------------------------------------------------------
        fc = b.fc
        if fc is not None:
            if t > fc.win_end:
                ev += self._fc_finish(b, t)
            elif t >= fc.win_start:
                if fc.param in new and fc.param not in excluded:
                    fc.vals.append(fresh[fc.param])
                cp = self.cfg.fluid_challenge.cvp_param
                if cp in new and cp not in excluded:
                    fc.cvp_vals.append(fresh[cp])

        # -- limits -------------------------------------------------------------------------
        conds = b.conds
        for lim in b.limits:
            p = lim.param
            if p not in new or p in excluded:
                continue
            v = fresh[p]
            c = conds.get(lim.rule)
            present = c is not None and c.raised > 0
            if lim.side == "high":
                viol = v > (lim.threshold - lim.hysteresis if present else lim.threshold)
            else:
                viol = v < (lim.threshold + lim.hysteresis if present else lim.threshold)
            if not viol and (c is None or (c.level == 0 and not c.raised)):
                continue
            self._cond(b, lim.spec, t, 1 if viol else 0, v,
                       {"param": p, "value": v, "limit": lim.threshold, "side": lim.side,
                        "hysteresis": lim.hysteresis, "delay_s": lim.spec.delay_s}, ev)

        # -- patterns: those whose level inputs are new or whose trends moved ------------
        dirty: list[bool] | None = None
        for p, ks in self._by_level:
            if p in new:
                if dirty is None:
                    dirty = [False] * len(self._patterns)
                for k in ks:
                    dirty[k] = True
        for p in changed:
            ks = self._by_trend.get(p)
            if ks:
                if dirty is None:
                    dirty = [False] * len(self._patterns)
                for k in ks:
                    dirty[k] = True
        if dirty is not None:
            for k, pat in enumerate(self._patterns):
                if dirty[k]:
                    self._eval_pattern(b, pat, t, fresh, excluded, ev)
        # -- profile: levels come from the trend points, so only when a bucket closed -----
        if self.cfg.profile.enabled and (changed or "PAWP" in new):
            for p in self._profile_inputs:
                if p in changed or (p == "PAWP" and p in new):
                    self._eval_profile(b, t, fresh, excluded, ev)
                    break
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
        if kind in self.cfg.artifacts.note_kinds:
            b = self._bed(bed)
            chs = self.art.note(b.art, t, param, duration_s)
            for p in self.art.affected(chs):
                tr = b.trends.get(p)
                if tr is not None:
                    tr.drop_since(t)
            if self.book.get(bed, ARTIFACT) is not None:
                ev += self._artifact_alarm(b, t)
        elif kind == "fluid_bolus" and self.cfg.fluid_challenge.enabled:
            ev += self._fc_open(self._bed(bed), t, volume_ml, over_min)
        return ev

    def on_admit(self, bed: str, t: float, limits: dict[str, dict[str, float]] | None = None,
                 discharged: bool = False) -> list[RuleEvent]:
        if not self.cfg.enabled:
            return []
        if discharged:
            ev = self.book.clear_bed(bed, t, "discharged")
            self._beds.pop(bed, None)
            return ev
        b = self._bed(bed)
        ov: dict[str, dict[str, float]] = {}
        for p, lim in (limits or {}).items():
            d = {k: float(v) for k, v in lim.items() if k in ("low", "high") and v is not None}
            if d:
                ov[p] = d
        b.overrides = ov
        b.limits = self._build_limits(ov) if ov else self._default_limits
        return []

    def on_command(self, bed: str, t: float, action: str, alarm: str,
                   by: str) -> list[RuleEvent]:
        """Acknowledge or pause the audio of one active alarm (by alarm id or rule id)."""
        if action == "acknowledge":
            a = self.book.find(bed, alarm)
            ev = self.book.acknowledge(bed, t, alarm, by)
            if a is not None and a.category == "technical" \
                    and self.cfg.alarms.acknowledge_clears_technical:
                self._technical_acknowledged(bed, a.rule)
            for e in ev:
                if e.transition == "cleared":
                    c = self._beds[bed].conds.get(e.rule) if bed in self._beds else None
                    if c is not None:
                        c.raised = 0
            return ev
        if action == "pause_audio":
            return self.book.pause_audio(bed, t, alarm, by)
        raise CommandError(f"unknown action {action!r}; expected acknowledge or pause_audio")

    # ================================================================== clock

    def tick(self, now: float) -> list[RuleEvent]:
        """Advance time-driven conditions to ``now`` (silent feeds and devices, delays that
        mature without a new sample, pause and acknowledgement expiry, escalation, the end of
        fluid-challenge windows)."""
        if now > self._clock:
            self._clock = now
        ev: list[RuleEvent] = []
        if not self.cfg.enabled:
            return ev
        heap = self._heap
        while heap and heap[0][0] <= now:
            _, _, kind, bed, key = heapq.heappop(heap)
            if kind in ("escalate", "silence_end"):
                ev += self.book.on_timer(kind, bed, key, now)
                continue
            b = self._beds.get(bed)
            if b is None:
                continue
            if kind == "feed":
                self._feed_timer(b, key, now, ev)
            elif kind == "device":
                self._device_timer(b, key, now, ev)
            elif kind == "cond":
                self._cond_timer(b, key, now, ev)
            elif kind == "notvalid":
                ev += self._not_valid_alarm(b, now)
            elif kind == "fluid":
                if b.fc is not None and b.fc.id == key:
                    ev += self._fc_finish(b, now)
            elif kind == "profile":
                self._profile_timer(b, now, ev)
        return ev

    # ================================================================== conditions

    def _cond(self, b: _Bed, spec: _Spec, t: float, level: int, value: float | None,
              details: dict, ev: list[RuleEvent]) -> None:
        c = b.conds.get(spec.rule)
        if c is None:
            c = b.conds[spec.rule] = _Cond(len(spec.priorities))
        prev_level = c.level
        started = c.update(t, level)
        c.value = value
        c.details = details
        if spec.delay_s > 0:
            for k in started:
                self._schedule(t + spec.delay_s, "cond", b.key, spec.rule)
        if level == 0 and prev_level != 0 and c.raised and spec.clear_delay_s > 0:
            self._schedule(t + spec.clear_delay_s, "cond", b.key, spec.rule)
        self._cond_outcome(b, spec, c, t, ev)

    def _cond_outcome(self, b: _Bed, spec: _Spec, c: _Cond, now: float,
                      ev: list[RuleEvent]) -> None:
        m = c.matured(now, spec.delay_s)
        if m > 0:
            if m > c.raised:
                c.raised = m
            pri = spec.priorities[c.raised - 1]
            ev += self.book.condition(b.key, spec.rule, now, pri, spec.category, c.value,
                                      c.details, latching=spec.latching, message=spec.message)
        elif c.raised and c.level == 0 and c.clear_since is not None \
                and now - c.clear_since >= spec.clear_delay_s - 1e-9:
            c.raised = 0
            ev += self.book.condition_ended(b.key, spec.rule, now, c.value, c.details)

    def _spec_for(self, b: _Bed, rule: str) -> _Spec | None:
        for lim in b.limits:
            if lim.rule == rule:
                return lim.spec
        for pat in self._patterns:
            if pat.rule == rule:
                return pat.spec
        return None

    def _cond_timer(self, b: _Bed, rule: str, now: float, ev: list[RuleEvent]) -> None:
        c = b.conds.get(rule)
        if c is None or now - c.last_t > self.cfg.alarms.tick_maturation_max_age_s:
            return
        spec = self._spec_for(b, rule)
        if spec is not None:
            self._cond_outcome(b, spec, c, now, ev)

    # ================================================================== patterns

    def _term(self, b: _Bed, term: _CTerm, t: float, fresh: dict[str, float],
              excluded: frozenset[str], relaxed: bool) -> tuple[bool | None, dict]:
        tc = self.cfg.trends
        for p in term.params:
            r: TrendReading | None = None
            if term.trend is not None:
                tr = b.trends.get(p)
                r = tr.reading(t) if tr is not None else None
                if r is None:
                    continue
            v = None
            if term.level:
                # the level of a pattern is the latest bucket value where the parameter is
                # trended (robust to single noisy samples), else the current value
                v = self._robust_level(b, p, t, fresh, excluded)
                if v is None:
                    continue
            info: dict[str, Any] = {"param": p}
            ok = True
            if r is not None:
                sa, sr = self._trend_cfg[p]
                want = term.trend
                scale = tc.hold_fraction if relaxed and want in ("rising", "falling") else 1.0
                d = r.direction(sa, sr, tc.min_tau, scale)
                info.update(trend=d, slope_per_10min=r.slope_per_10min, tau=r.tau,
                            level=r.level, required=want)
                if want == "not_falling":
                    ok = d != "falling"
                elif want == "not_rising":
                    ok = d != "rising"
                else:
                    ok = d == want
            if v is not None:
                h = term.hysteresis if relaxed else 0.0
                info["value"] = v
                if term.at_least is not None:
                    info["at_least"] = term.at_least
                    ok = ok and v >= term.at_least - h
                if term.below is not None:
                    info["below"] = term.below
                    ok = ok and v < term.below + h
            return ok, info
        return None, {"param": term.params, "no_data": True}

    def _terms(self, b: _Bed, terms: tuple[_CTerm, ...], t: float, fresh: dict[str, float],
               excluded: frozenset[str], relaxed: bool, infos: list) -> bool | None:
        result: bool | None = True
        for term in terms:
            ok, info = self._term(b, term, t, fresh, excluded, relaxed)
            infos.append(info)
            if ok is False:
                return False
            if ok is None:
                result = None
        return result

    def _eval_pattern(self, b: _Bed, pat: _Pattern, t: float, fresh: dict[str, float],
                      excluded: frozenset[str], ev: list[RuleEvent]) -> None:
        c = b.conds.get(pat.rule)
        raised = c.raised if c is not None else 0
        infos: list[dict] = []
        ok = self._terms(b, pat.terms, t, fresh, excluded, raised >= 1, infos)
        if ok is None:
            return                    # no data: the condition neither starts nor ends
        level = 0
        if ok:
            level = 1
            for k, tier in enumerate(pat.tiers):
                tinfo: list[dict] = []
                tok = self._terms(b, tier, t, fresh, excluded, raised >= k + 2, tinfo)
                if not tok:
                    break
                infos += tinfo
                level = k + 2
        if level == 0 and (c is None or (c.level == 0 and not c.raised)):
            return
        first = infos[0] if infos else {}
        value = first.get("value", first.get("level"))
        self._cond(b, pat.spec, t, level, value,
                   {"terms": infos, "message": pat.spec.message, "level": level}, ev)

    # ================================================================== technical

    def _aggregate(self, b: _Bed, rule: str, t: float, items: list[str], priority: str,
                   details: dict, message: str) -> list[RuleEvent]:
        if items:
            return self.book.condition(b.key, rule, t, priority, "technical", None, details,
                                       signature=tuple(items), message=message)
        return self.book.condition_ended(b.key, rule, t)

    def _feed_alarm(self, b: _Bed, t: float) -> list[RuleEvent]:
        # a feed counts as silent only while its device still talks; when the device went
        # quiet as a whole, device_silent says so once instead of a list of feeds
        after = self.cfg.technical.device_silent_after_s
        items = []
        for p in sorted(b.silent):
            d = b.param_device.get(p)
            if d in b.dev_silent or d in b.dev_ignored or t - b.dev_last.get(d, _NINF) >= after:
                continue
            items.append(p)
        if not items and self.book.get(b.key, FEED_SILENT) is None:
            return []
        return self._aggregate(
            b, FEED_SILENT, t, items, self.cfg.technical.feed_silent_priority,
            {"params": items, "silent_since": {p: b.silent[p] for p in items},
             "after_s": {p: self._feed_after[p] for p in items}},
            "no values from " + ", ".join(items) if items else "")

    def _device_alarm(self, b: _Bed, t: float) -> list[RuleEvent]:
        items = sorted(b.dev_silent)
        if not items and self.book.get(b.key, DEVICE_SILENT) is None:
            return []
        return self._aggregate(
            b, DEVICE_SILENT, t, items, self.cfg.technical.device_silent_priority,
            {"devices": items, "silent_since": {d: b.dev_silent[d] for d in items},
             "after_s": self.cfg.technical.device_silent_after_s},
            "no messages from " + ", ".join(items) if items else "")

    def _not_valid_alarm(self, b: _Bed, t: float) -> list[RuleEvent]:
        after = self.cfg.technical.not_valid_after_s
        items = sorted(p for p, (s, _) in b.notvalid.items() if t - s >= after - 1e-9)
        if not items and self.book.get(b.key, NOT_VALID) is None:
            return []
        return self._aggregate(
            b, NOT_VALID, t, items, self.cfg.technical.not_valid_priority,
            {"params": items, "status": {p: b.notvalid[p][1] for p in items},
             "since": {p: b.notvalid[p][0] for p in items}, "after_s": after},
            "values not valid: " + ", ".join(items) if items else "")

    def _artifact_alarm(self, b: _Bed, t: float) -> list[RuleEvent]:
        items = sorted(self.art.suspected(b.art, t))
        if not items and self.book.get(b.key, ARTIFACT) is None:
            return []
        return self._aggregate(
            b, ARTIFACT, t, items, self.cfg.artifacts.suspected_priority,
            {"channels": items, "since": {c: b.art.sig_since[c] for c in items},
             "after_s": self.cfg.artifacts.suspected_after_s},
            "suspected artifact on " + ", ".join(items) if items else "")

    def _feed_timer(self, b: _Bed, p: str, now: float, ev: list[RuleEvent]) -> None:
        last = b.last_seen.get(p)
        if last is None or p in b.silent or p in b.ignored:
            b.feed_sched.pop(p, None)
            return
        due = last + self._feed_after[p]
        if now >= due:
            b.feed_sched.pop(p, None)
            b.silent[p] = now
            ev += self._feed_alarm(b, now)
        else:
            self._schedule(due, "feed", b.key, p)

    def _device_timer(self, b: _Bed, d: str, now: float, ev: list[RuleEvent]) -> None:
        last = b.dev_last.get(d)
        if last is None or d in b.dev_silent or d in b.dev_ignored:
            b.dev_sched.pop(d, None)
            return
        due = last + self.cfg.technical.device_silent_after_s
        if now >= due:
            b.dev_sched.pop(d, None)
            b.dev_silent[d] = now
            ev += self._device_alarm(b, now)
            ev += self._feed_alarm(b, now)
        else:
            self._schedule(due, "device", b.key, d)

    def _technical_acknowledged(self, bed: str, rule: str) -> None:
        b = self._beds.get(bed)
        if b is None:
            return
        if rule == FEED_SILENT:
            for p in list(b.silent):
                b.ignored[p] = None
            b.silent.clear()
        elif rule == DEVICE_SILENT:
            for d in list(b.dev_silent):
                b.dev_ignored[d] = None
            b.dev_silent.clear()
        elif rule == NOT_VALID:
            b.notvalid.clear()
        elif rule == ARTIFACT:
            for ch in list(b.art.sig_since):
                b.art.ignored[ch] = None
            b.art.sig_since.clear()

    # ================================================================== fluid challenge

    def _fc_open(self, b: _Bed, t: float, volume_ml: float | None,
                 over_min: float | None) -> list[RuleEvent]:
        fcc = self.cfg.fluid_challenge
        ev: list[RuleEvent] = []
        if b.fc is not None:
            ev += self._fc_finish(b, t, interrupted=True)
        over = fcc.default_over_min if over_min is None else float(over_min)
        end = t + over * 60.0
        ws = max(t, end + fcc.after_delay_s)
        we = ws + fcc.after_window_s
        param = baseline = None
        npts = 0
        for p in self._fc_params:
            tr = b.trends.get(p)
            if tr is None:
                continue
            pts = tr.points_between(t - fcc.baseline_s, t)
            if len(pts) >= fcc.min_baseline_points:
                param, baseline, npts = p, _median(pts), len(pts)
                break
        cvp_base = None
        ctr = b.trends.get(fcc.cvp_param)
        if ctr is not None:
            cp = ctr.points_between(t - fcc.baseline_s, t)
            if cp:
                cvp_base = _median(cp)
        aid = self._info_id(b.key, FLUID)
        base = {"bolus_time": t, "volume_ml": volume_ml, "over_min": over,
                "threshold_pct": fcc.responsive_change_pct}
        if param is None or baseline is None or baseline <= 0:
            res = {**base, "outcome": "not_evaluable",
                   "reason": f"no baseline: fewer than {fcc.min_baseline_points} trend points "
                             f"of {', '.join(self._fc_params)} in the {fcc.baseline_s:g} s "
                             "before the bolus"}
            b.fc_last = res
            ev.append(RuleEvent(t, b.key, aid, FLUID, "info", "information", "result", None,
                                res))
            return ev
        b.fc = _Eval(aid, t, volume_ml, over, param, baseline, cvp_base, ws, we)
        self._schedule(we, "fluid", b.key, aid)
        ev.append(RuleEvent(t, b.key, aid, FLUID, "info", "information", "opened", baseline,
                            {**base, "param": param, "baseline": baseline,
                             "baseline_points": npts, "cvp_baseline": cvp_base,
                             "window_start": ws, "window_end": we}))
        return ev

    def _fc_finish(self, b: _Bed, t: float, interrupted: bool = False) -> list[RuleEvent]:
        fc = b.fc
        if fc is None:
            return []
        b.fc = None
        fcc = self.cfg.fluid_challenge
        res: dict[str, Any] = {
            "bolus_time": fc.bolus_t, "volume_ml": fc.volume_ml, "over_min": fc.over_min,
            "param": fc.param, "baseline": fc.baseline, "threshold_pct":
            fcc.responsive_change_pct, "window_start": fc.win_start, "window_end": fc.win_end,
            "after_samples": len(fc.vals), "cvp_baseline": fc.cvp_baseline}
        value = None
        if interrupted and len(fc.vals) < fcc.min_after_samples:
            res.update(outcome="not_evaluable", reason="a new fluid bolus began before the "
                                                       "window ended")
        elif len(fc.vals) < fcc.min_after_samples:
            res.update(outcome="not_evaluable",
                       reason=f"{len(fc.vals)} valid {fc.param} values in the window "
                              f"(at least {fcc.min_after_samples} needed)")
        else:
            after = _median(fc.vals)
            change = (after - fc.baseline) / fc.baseline * 100.0
            value = change
            res.update(after=after, change_pct=change,
                       responsive=change >= fcc.responsive_change_pct - 1e-9,
                       outcome="responsive" if change >= fcc.responsive_change_pct - 1e-9
                       else "not_responsive")
            if interrupted:
                res["note"] = "window cut short by a new fluid bolus"
            if fc.cvp_vals and fc.cvp_baseline is not None:
                ca = _median(fc.cvp_vals)
                res.update(cvp_after=ca, cvp_change=ca - fc.cvp_baseline)
            else:
                res.update(cvp_after=None, cvp_change=None)
        b.fc_last = res
        return [RuleEvent(t, b.key, fc.id, FLUID, "info", "information", "result", value, res)]

    # ================================================================== profile

    def _robust_level(self, b: _Bed, p: str, t: float, fresh: dict[str, float],
                      excluded: frozenset[str]) -> float | None:
        tr = b.trends.get(p)
        if tr is not None:
            lp = tr.last_point()
            if lp is not None and t - lp[0] <= 2 * self.cfg.trends.bucket_s:
                return lp[1]
        if p in excluded:
            return None
        return fresh.get(p)

    def classify(self, levels: dict[str, float | None]) -> str | None:
        """Profile read-out from levels of CVP, PAWP, CI and SVR (None where absent).

        Common practice (critical care teaching; docs/sources.md): hypovolemic
        (low filling pressures, low CI, high SVR), cardiogenic (high PAWP, low CI, high SVR),
        obstructive (high CVP with PAWP not high, low CI, high SVR), distributive (low SVR,
        CI normal or high). Without PAWP a high CVP with low CI and high SVR cannot tell
        cardiogenic from obstructive and says so.
        """
        rg = self._profile_ranges
        ci, svr = levels.get("CI"), levels.get("SVR")
        if ci is None or svr is None:
            return None
        cvp, pawp = levels.get("CVP"), levels.get("PAWP")

        def cls(v: float | None, p: str) -> str | None:
            if v is None:
                return None
            lo, hi = rg[p]
            return "low" if v < lo else "high" if v > hi else "normal"

        c_ci, c_svr, c_cvp, c_pawp = cls(ci, "CI"), cls(svr, "SVR"), cls(cvp, "CVP"), \
            cls(pawp, "PAWP")
        if c_svr == "low" and c_ci != "low":
            return "distributive"
        if c_ci == "low" and c_svr == "high":
            fill = [x for x in (c_cvp, c_pawp) if x is not None]
            if fill and "low" in fill and "high" not in fill:
                return "hypovolemic"
            if c_pawp == "high":
                return "cardiogenic"
            if c_cvp == "high":
                return "obstructive" if c_pawp is not None else "cardiogenic_or_obstructive"
        return None

    def _eval_profile(self, b: _Bed, t: float, fresh: dict[str, float],
                      excluded: frozenset[str], ev: list[RuleEvent]) -> None:
        levels = {p: self._robust_level(b, p, t, fresh, excluded)
                  for p in self._profile_inputs}
        cls = self.classify(levels)
        if cls == b.profile:
            b.cand = None
            b.cand_since = None
            return
        if cls != b.cand or b.cand_since is None:
            b.cand = cls
            b.cand_since = t
            b.cand_levels = levels       # levels at the start of the candidate
            if self.cfg.profile.hold_s > 0:
                self._schedule(t + self.cfg.profile.hold_s, "profile", b.key, "")
                return
        self._profile_outcome(b, t, levels, ev)

    def _profile_timer(self, b: _Bed, now: float, ev: list[RuleEvent]) -> None:
        if b.cand_since is None or now - b.last_t > self.cfg.alarms.tick_maturation_max_age_s:
            return
        self._profile_outcome(b, now, None, ev)

    def _profile_outcome(self, b: _Bed, t: float, levels: dict | None,
                         ev: list[RuleEvent]) -> None:
        if b.cand_since is None or t - b.cand_since < self.cfg.profile.hold_s - 1e-9:
            return
        b.profile = b.cand
        b.cand = None
        b.cand_since = None
        if levels is None:
            levels = b.cand_levels
        text = PROFILE_TEXT.get(b.profile) if b.profile else None
        ev.append(RuleEvent(
            t, b.key, self._info_id(b.key, PROFILE), PROFILE, "info", "information",
            "profile", None,
            {"profile": b.profile, "text": text,
             "note": "information for the clinician, not a diagnosis",
             "levels": levels,
             "ranges": {p: list(r) for p, r in self._profile_ranges.items()}}))

    # ================================================================== read-outs

    def bed_view(self, bed: str) -> dict[str, Any]:
        """Dashboard model of one bed (JSON-able)."""
        b = self._beds.get(bed)
        if b is None:
            return {"trends": {}, "alarms": [], "profile": None, "profile_text": None,
                    "fluid_challenge": None}
        tc = self.cfg.trends
        trends: dict[str, dict] = {}
        for p in self._trend_params:
            tr = b.trends.get(p)
            if tr is None:
                continue
            r = tr.reading(b.last_t)
            if r is None:
                trends[p] = {"direction": None, "slope_per_10min": None}
            else:
                sa, sr = self._trend_cfg[p]
                trends[p] = {"direction": r.direction(sa, sr, tc.min_tau),
                             "slope_per_10min": r.slope_per_10min, "tau": r.tau,
                             "points": r.points}
        return {"trends": trends,
                "alarms": [a.as_dict() for a in self.book.active(bed)],
                "profile": b.profile,
                "profile_text": PROFILE_TEXT.get(b.profile) if b.profile else None,
                "fluid_challenge": dict(b.fc_last) if b.fc_last else None,
                "fluid_challenge_open": b.fc is not None}

    def trend_directions(self, bed: str) -> dict[str, str]:
        """Current trend direction per trended parameter that has one (cheap: for publishing
        with every derived message)."""
        b = self._beds.get(bed)
        if b is None:
            return {}
        tc = self.cfg.trends
        out: dict[str, str] = {}
        for p, tr in b.trends.items():
            r = tr.reading(b.last_t)
            if r is not None:
                sa, sr = self._trend_cfg[p]
                out[p] = r.direction(sa, sr, tc.min_tau)
        return out

    def alarm_state(self, bed: str) -> dict[str, Any]:
        """Current alarm state of the bed (retained on ``hemo/<unit>/<bed>/alarm``)."""
        act = self.book.active(bed)
        return {"alarms": [a.as_dict() for a in act], "count": len(act),
                "highest": act[0].priority if act else None}
