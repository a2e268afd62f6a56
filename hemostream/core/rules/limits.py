"""Low/high limits: configuration, the one rule for merging admission overrides over the
configured limits (:func:`applied_limits`), and their evaluation per sample.

A limit is violated when the value is beyond its threshold; once the alarm is raised the value
must come back inside by ``hysteresis`` before the condition counts as absent. Rule ids are
``<PARAM>_low`` and ``<PARAM>_high``. Pure: no I/O, no clock.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any, Mapping

from pydantic import BaseModel, Field, model_validator

from ..alarms import RuleEvent
from .common import STRICT, Priority, Seconds
from .conditions import Conditions, Spec
from .state import BedState

__all__ = ["LimitRule", "LimitDefaults", "Limit", "Limits", "limit_overrides",
           "applied_limits"]

SIDES = ("low", "high")


# --------------------------------------------------------------------------- configuration


class LimitRule(BaseModel):
    """Low/high limit on one parameter. Rule ids are ``<PARAM>_low`` and ``<PARAM>_high``."""

    model_config = STRICT
    low: float | None = None
    high: float | None = None
    low_priority: Priority = "medium"
    high_priority: Priority = "medium"
    #: alarm condition delay: the value must be beyond the limit this long
    delay_s: Seconds = 10.0
    #: the condition ends when the value is back inside by this much ...
    hysteresis: Annotated[float, Field(ge=0)] = 0.0
    #: ... for this long
    clear_delay_s: Seconds = 5.0
    #: None: by priority (alarms.latching)
    latching: bool | None = None
    description: str = ""
    source: str = ""

    @model_validator(mode="after")
    def _ordered(self) -> "LimitRule":
        if self.low is not None and self.high is not None and self.low >= self.high:
            raise ValueError(f"low ({self.low}) must be below high ({self.high})")
        return self


def default_limits() -> dict[str, LimitRule]:
    src = ("typical adult range widened so that a stable adult does not alarm; "
           "critical care texts, from memory")
    L = LimitRule
    return {
        "HR": L(low=40, high=140, delay_s=10, hysteresis=3, source=src),
        "MAP": L(low=60, high=120, low_priority="high", delay_s=10, hysteresis=3,
                 source=src + "; MAP 70-105 typical"),
        "SBP": L(low=80, high=190, low_priority="high", delay_s=10, hysteresis=4, source=src),
        "SPO2": L(low=88, low_priority="medium", delay_s=15, hysteresis=1, source=src),
        "RR": L(low=6, high=35, delay_s=20, hysteresis=2, source=src),
        "TEMP": L(low=35.0, high=39.0, low_priority="low", high_priority="low", delay_s=60,
                  hysteresis=0.2, source=src),
        "CVP": L(high=18, high_priority="low", delay_s=60, hysteresis=1,
                 source=src + "; CVP 2-8 typical"),
        "PAP_MEAN": L(high=40, high_priority="low", delay_s=60, hysteresis=2, source=src),
        # a wedge pressure is one intermittent reading: nothing to sustain, so no delay
        "PAWP": L(high=18, high_priority="medium", delay_s=0, hysteresis=1,
                  source="PAWP > 18 mm[Hg]: pulmonary congestion (Forrester JS et al., "
                         "N Engl J Med 1976;295:1356, published); PAWP 6-12 typical"),
    }


class LimitDefaults(BaseModel):
    """Used for a parameter that an ``admit`` message limits but the config does not."""

    model_config = STRICT
    priority: Priority = "medium"
    delay_s: Seconds = 10.0
    hysteresis: Annotated[float, Field(ge=0)] = 0.0
    clear_delay_s: Seconds = 5.0


# --------------------------------------------------------------------------- merge rule


def limit_overrides(raw: Mapping[str, Mapping[str, Any]] | None) -> dict[str, dict[str, float]]:
    """The usable part of an admission's ``limits``: per parameter, its ``low`` / ``high``
    numbers as floats (other keys and None dropped; parameters left with neither dropped)."""
    ov: dict[str, dict[str, float]] = {}
    for p, lim in (raw or {}).items():
        d = {k: float(v) for k, v in lim.items() if k in SIDES and v is not None}
        if d:
            ov[p] = d
    return ov


def applied_limits(limits: Mapping[str, LimitRule],
                   overrides: Mapping[str, Mapping[str, Any]] | None = None
                   ) -> dict[str, dict[str, float]]:
    """The limits in effect: ``{param: {"low": x, "high": y}}`` (only the sides that exist).

    ``limits`` is the configuration's (``RulesConfig.limits``), ``overrides`` an admission's
    ``limits`` (raw from the message or the store; see :func:`limit_overrides`). A side given
    by the override replaces the configured side; a side it does not give keeps the configured
    one; a parameter only the override names gets the sides it gives. Order: the configured
    parameters in configuration order, then the other overridden ones in their order. This
    is the one merge rule; the rules engine and the review report both use it.
    """
    ov = limit_overrides(overrides)
    out: dict[str, dict[str, float]] = {}
    names = list(limits) + [p for p in ov if p not in limits]
    for p in names:
        rule = limits.get(p)
        o = ov.get(p, {})
        sides: dict[str, float] = {}
        for side in SIDES:
            thr = o.get(side, getattr(rule, side) if rule is not None else None)
            if thr is not None:
                sides[side] = float(thr)
        if sides:
            out[p] = sides
    return out


# --------------------------------------------------------------------------- evaluation


@dataclass(frozen=True, slots=True)
class Limit:
    """One side of one parameter's limit, as evaluated."""

    param: str
    side: str
    rule: str
    threshold: float
    hysteresis: float
    spec: Spec


class Limits:
    """Builds the limits of a bed and evaluates them on new values."""

    def __init__(self, cfg: Any, conditions: Conditions) -> None:
        self.cfg = cfg
        self.conditions = conditions
        self._specs: dict[tuple[str, str], Spec] = {}
        #: limits of a bed without admission overrides (shared by those beds)
        self.defaults = self.build({})
        self.params = tuple(dict.fromkeys(lim.param for lim in self.defaults))

    def _spec(self, param: str, side: str, rule: LimitRule | None) -> Spec:
        if rule is None:
            d = self.cfg.limit_defaults
            return Spec(f"{param}_{side}", (d.priority,), "physiological", d.delay_s,
                        d.clear_delay_s, None, f"{param} {side}")
        key = (param, side)
        s = self._specs.get(key)
        if s is None:
            pri = rule.low_priority if side == "low" else rule.high_priority
            s = Spec(f"{param}_{side}", (pri,), "physiological", rule.delay_s,
                     rule.clear_delay_s, rule.latching, rule.description or f"{param} {side}")
            self._specs[key] = s
        return s

    def build(self, overrides: dict[str, dict[str, float]]) -> list[Limit]:
        out: list[Limit] = []
        for p, sides in applied_limits(self.cfg.limits, overrides).items():
            rule = self.cfg.limits.get(p)
            hyst = rule.hysteresis if rule is not None else self.cfg.limit_defaults.hysteresis
            for side, thr in sides.items():
                out.append(Limit(p, side, f"{p}_{side}", thr, hyst,
                                 self._spec(p, side, rule)))
        return out

    def admit(self, b: BedState, raw: Mapping[str, Mapping[str, Any]] | None) -> None:
        """An admission: its overrides replace the bed's earlier ones."""
        ov = limit_overrides(raw)
        b.overrides = ov
        b.limits = self.build(ov) if ov else self.defaults

    def evaluate(self, b: BedState, t: float, fresh: dict[str, float], new: frozenset[str],
                 excluded: frozenset[str], ev: list[RuleEvent]) -> None:
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
            self.conditions.update(
                b, lim.spec, t, 1 if viol else 0, v,
                {"param": p, "value": v, "limit": lim.threshold, "side": lim.side,
                 "hysteresis": lim.hysteresis, "delay_s": lim.spec.delay_s}, ev)
