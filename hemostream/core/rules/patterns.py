"""Pattern rules: configuration (with the shipped patterns and their sources), and their
evaluation from trends and levels.

A pattern is a list of terms that must all hold (a trend direction or a level threshold of a
parameter, or of the first of a list of alternatives that has data), optionally with tiers:
extra terms that raise the priority when they hold too. A pattern whose inputs have no data
neither starts nor ends. Once raised, trend terms count while the slope is beyond
``trends.hold_fraction`` of the band and level terms apply their hysteresis.

A pattern is a prompt to look, never a diagnosis. Pure: no I/O, no clock.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any, Literal

from pydantic import BaseModel, Field, model_validator

from ..alarms import RuleEvent
from ..trends import TrendReading
from .common import STRICT, Priority, Seconds, check_params
from .conditions import Conditions, Spec
from .state import BedState
from .trending import Trending

__all__ = ["Term", "Tier", "PatternRule", "Pattern", "Patterns"]


# --------------------------------------------------------------------------- configuration


class Term(BaseModel):
    """One condition of a pattern rule.

    ``param`` is a name or a list of alternatives (the first one that has data is used).
    ``trend`` asks for the trend direction; ``at_least`` / ``below`` ask for the level
    (the current valid value), with ``hysteresis`` applied while the alarm is present.
    """

    model_config = STRICT
    param: str | list[str]
    trend: Literal["rising", "falling", "steady", "not_falling", "not_rising"] | None = None
    at_least: float | None = None
    below: float | None = None
    hysteresis: Annotated[float, Field(ge=0)] = 0.0

    @model_validator(mode="after")
    def _one_kind(self) -> "Term":
        names = [self.param] if isinstance(self.param, str) else self.param
        if not names:
            raise ValueError("param: give at least one parameter")
        check_params(names, "param")
        if self.trend is None and self.at_least is None and self.below is None:
            raise ValueError("a term needs trend, at_least or below")
        return self

    @property
    def params(self) -> list[str]:
        return [self.param] if isinstance(self.param, str) else list(self.param)


class Tier(BaseModel):
    """A stronger form of a pattern: when its extra terms hold too, the priority is higher."""

    model_config = STRICT
    priority: Priority
    terms: list[Term]


class PatternRule(BaseModel):
    model_config = STRICT
    enabled: bool = True
    description: str = ""
    source: str = ""
    terms: Annotated[list[Term], Field(min_length=1)]
    priority: Priority = "medium"
    tiers: list[Tier] = Field(default_factory=list)
    delay_s: Seconds = 60.0
    clear_delay_s: Seconds = 30.0
    latching: bool | None = None
    #: the text shown with the alarm
    message: str = ""


def default_patterns() -> dict[str, PatternRule]:
    T, P = Term, PatternRule
    return {
        "right_heart_mismatch": P(
            description="CVP rising while cardiac output (CI, or CO without a body surface "
                        "area) falls over the trend window: filling pressure backing up while "
                        "output drops. Silent when CVP and output rise together (a "
                        "preload-responsive patient being filled) or when only one moves.",
            source="Frank-Starling: Patterson SW, Starling EH, J Physiol 1914;48:357; "
                   "venous return and cardiac function curves: Guyton AC, Physiol Rev "
                   "1955;35:123 (published, qualitative); thresholds: project choice",
            message="possible right-heart / pump mismatch",
            terms=[T(param="CVP", trend="rising"), T(param=["CI", "CO"], trend="falling")],
            priority="medium", delay_s=15, clear_delay_s=60),
        "shock_index_high": P(
            description="Shock index (HR / systolic pressure) at or above the warning level "
                        "0.9 (low priority), at or above 1.0 (medium priority), sustained.",
            source="Allgower M, Burri C, Dtsch Med Wochenschr 1967;92:1947 (normal 0.5-0.7, "
                   "published); SI >= 1.0 as a warning sign of shock: common practice",
            message="shock index high",
            terms=[T(param="SI", at_least=0.9, hysteresis=0.05)],
            priority="low",
            tiers=[Tier(priority="medium", terms=[T(param="SI", at_least=1.0,
                                                    hysteresis=0.05)])],
            delay_s=60, clear_delay_s=60),
        "shock_index_rising": P(
            description="Shock index rising over the trend window while above the upper "
                        "normal value 0.7.",
            source="Allgower M, Burri C, Dtsch Med Wochenschr 1967;92:1947 (normal 0.5-0.7, "
                   "published); rise band: project choice",
            message="shock index rising",
            terms=[T(param="SI", trend="rising"), T(param="SI", at_least=0.7)],
            priority="low", delay_s=60, clear_delay_s=60),
        "low_output": P(
            description="Cardiac index below 2.2 L/min/m2, sustained.",
            source="CI 2.5-4.0 L/min/m2 typical; 2.2 as the low-output threshold of the "
                   "Forrester classes (Forrester JS et al., N Engl J Med 1976;295:1356) - "
                   "from memory",
            message="low cardiac output",
            terms=[T(param="CI", below=2.2, hysteresis=0.1)],
            priority="medium", delay_s=120, clear_delay_s=60),
        "hypovolemia_pattern": P(
            description="CVP and cardiac output falling while HR rises: losing volume.",
            source="hemorrhage response, American College of Surgeons ATLS classes (from "
                   "memory); Guyton AC, Physiol Rev 1955;35:123 (published, qualitative)",
            message="pattern consistent with falling volume",
            terms=[T(param="CVP", trend="falling"), T(param=["CI", "CO"], trend="falling"),
                   T(param="HR", trend="rising")],
            priority="medium", delay_s=60, clear_delay_s=60),
        "vasodilation_pattern": P(
            description="SVR and MAP falling while cardiac output is held or rising: "
                        "vessels relaxing.",
            source="MAP - CVP = CO x SVR (hydraulic analogue of Ohm's law), critical care "
                   "texts (Marino, The ICU Book) - from memory",
            message="pattern consistent with vasodilation",
            terms=[T(param="SVR", trend="falling"), T(param="MAP", trend="falling"),
                   T(param=["CI", "CO"], trend="not_falling")],
            priority="low", delay_s=60, clear_delay_s=60),
    }


# --------------------------------------------------------------------------- evaluation


@dataclass(frozen=True, slots=True)
class CTerm:
    """A pattern term with its parameter list resolved once."""

    params: tuple[str, ...]
    trend: str | None
    at_least: float | None
    below: float | None
    hysteresis: float
    level: bool

    @classmethod
    def of(cls, t: Term) -> "CTerm":
        return cls(tuple(t.params), t.trend, t.at_least, t.below, t.hysteresis,
                   t.at_least is not None or t.below is not None)


class Pattern:
    __slots__ = ("rule", "cfg", "spec", "trend_inputs", "level_inputs", "terms", "tiers")

    def __init__(self, rule: str, cfg: PatternRule) -> None:
        self.rule = rule
        self.cfg = cfg
        pri = (cfg.priority,) + tuple(t.priority for t in cfg.tiers)
        self.spec = Spec(rule, pri, "physiological", cfg.delay_s, cfg.clear_delay_s,
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
        self.terms = tuple(CTerm.of(t) for t in cfg.terms)
        self.tiers = tuple(tuple(CTerm.of(t) for t in tier.terms) for tier in cfg.tiers)


class Patterns:
    """The enabled pattern rules, indexed by the inputs that make them worth evaluating."""

    def __init__(self, cfg: Any, trending: Trending, conditions: Conditions) -> None:
        self.cfg = cfg
        self.trending = trending
        self.conditions = conditions
        self.patterns = tuple(Pattern(rid, p) for rid, p in cfg.patterns.items() if p.enabled)
        # parameter -> indices of the patterns that read its trend / its level
        self.by_trend: dict[str, list[int]] = {}
        by_level: dict[str, list[int]] = {}
        trended = set(cfg.trends.params)
        for k, pat in enumerate(self.patterns):
            for p in pat.trend_inputs:
                self.by_trend.setdefault(p, []).append(k)
            for p in pat.level_inputs:
                # a trended level is read from its bucket points: new once per bucket
                if p in trended:
                    if k not in self.by_trend.setdefault(p, []):
                        self.by_trend[p].append(k)
                else:
                    by_level.setdefault(p, []).append(k)
        self.by_level = tuple(by_level.items())

    def spec(self, rule: str) -> Spec | None:
        for pat in self.patterns:
            if pat.rule == rule:
                return pat.spec
        return None

    def evaluate(self, b: BedState, t: float, fresh: dict[str, float], new: frozenset[str],
                 changed: list[str], excluded: frozenset[str], ev: list[RuleEvent]) -> None:
        """Evaluate the patterns whose level inputs are new or whose trends moved."""
        dirty: list[bool] | None = None
        for p, ks in self.by_level:
            if p in new:
                if dirty is None:
                    dirty = [False] * len(self.patterns)
                for k in ks:
                    dirty[k] = True
        for p in changed:
            kt = self.by_trend.get(p)
            if kt:
                if dirty is None:
                    dirty = [False] * len(self.patterns)
                for k in kt:
                    dirty[k] = True
        if dirty is not None:
            for k, pat in enumerate(self.patterns):
                if dirty[k]:
                    self._eval(b, pat, t, fresh, excluded, ev)

    def _term(self, b: BedState, term: CTerm, t: float, fresh: dict[str, float],
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
                v = self.trending.robust_level(b, p, t, fresh, excluded)
                if v is None:
                    continue
            info: dict[str, Any] = {"param": p}
            ok = True
            if r is not None:
                sa, sr = self.trending.bands[p]
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

    def _terms(self, b: BedState, terms: tuple[CTerm, ...], t: float, fresh: dict[str, float],
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

    def _eval(self, b: BedState, pat: Pattern, t: float, fresh: dict[str, float],
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
        self.conditions.update(b, pat.spec, t, level, value,
                               {"terms": infos, "message": pat.spec.message, "level": level},
                               ev)
