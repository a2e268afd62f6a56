"""Configuration of the rules layer: trends, artifacts, limits, patterns, fluid challenge,
hemodynamic profile, technical conditions and the alarm lifecycle.

:class:`RulesConfig` is the ``[rules]`` table of the project's TOML configuration. Every field
has a default, and the defaults are the shipped rules; ``configs/rules.toml`` spells the same
defaults out with the source of every number, and ``docs/rules.md`` explains every rule.
Unknown keys are errors (``extra="forbid"``), so a misspelt option is reported, not ignored.

A table that holds a set of named entries (``limits``, ``patterns``, ``trends.params`` ...)
replaces the shipped set as a whole when it is given: a file that sets ``[rules.limits.HR]``
and nothing else has an HR limit and no other. ``configs/rules.toml`` is the full set to start
from.

All numbers are in canonical units (mm[Hg], /min, L/min, mL, %, Cel, L/min/m2, dyn.s/cm5) and
seconds. Trend slopes and trend bands are per 10 minutes.
"""

from __future__ import annotations

import re
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from .wire import PARAMS

_STRICT = ConfigDict(extra="forbid")

#: derived values the processing core may hand to the rules layer (besides measured ones)
DERIVED_PARAMS = ("MAP", "SBP", "PP", "SV", "CO", "BSA", "CI", "SVI", "SVR", "SVRI", "PVR",
                  "LVSWI", "RVSWI", "SI", "MSI")
#: every parameter name a rule may refer to
KNOWN_PARAMS: tuple[str, ...] = tuple(PARAMS) + tuple(p for p in DERIVED_PARAMS
                                                      if p not in PARAMS)

Priority = Literal["high", "medium", "low"]
Seconds = Annotated[float, Field(ge=0)]
PosSeconds = Annotated[float, Field(gt=0)]
_RULE_ID = re.compile(r"^[a-z][a-z0-9_]{0,63}$")


def _check_params(names, where: str) -> None:
    bad = [n for n in names if n not in KNOWN_PARAMS]
    if bad:
        raise ValueError(f"{where}: unknown parameter(s) {bad}; expected names from "
                         + ", ".join(KNOWN_PARAMS))


# --------------------------------------------------------------------------- trends


class TrendParam(BaseModel):
    """Which parameters get a trend, and the band inside which a slope reads as steady.

    The band is ``max(steady_abs, steady_rel * |level|)`` per 10 minutes, where level is the
    median of the window's points.
    """

    model_config = _STRICT
    steady_abs: Annotated[float, Field(ge=0)]
    steady_rel: Annotated[float, Field(ge=0, le=1)] = 0.0
    #: a jump between consecutive bucket points larger than this restarts the trend
    step_reset: Annotated[float, Field(gt=0)] | None = None


def _default_trend_params() -> dict[str, TrendParam]:
    # Steady bands per 10 minutes: the project's choice, set above the drift of a stable adult
    # and below the change a clinician would call a trend (common practice, from memory).
    a = TrendParam
    return {
        "HR": a(steady_abs=5.0),            # /min
        "MAP": a(steady_abs=5.0),           # mm[Hg]
        "SBP": a(steady_abs=8.0),           # mm[Hg]
        "CVP": a(steady_abs=0.6, step_reset=3.0),        # mm[Hg]
        "PAP_MEAN": a(steady_abs=3.0, step_reset=6.0),   # mm[Hg]
        "PAWP": a(steady_abs=2.0),          # mm[Hg]
        "CO": a(steady_abs=0.15, steady_rel=0.04),   # L/min, or 4 % of the level
        "CI": a(steady_abs=0.08, steady_rel=0.04),   # L/min/m2
        "SV": a(steady_abs=3.0, steady_rel=0.05),    # mL
        "SVI": a(steady_abs=2.0, steady_rel=0.05),   # mL/m2
        "SVR": a(steady_abs=60.0, steady_rel=0.06),  # dyn.s/cm5
        "SI": a(steady_abs=0.08),           # 1
        "SPO2": a(steady_abs=1.5),          # %
        "RR": a(steady_abs=3.0),            # /min
        "TEMP": a(steady_abs=0.3),          # Cel
    }


class TrendConfig(BaseModel):
    """Robust windowed trends: Theil-Sen slope over bucket medians (see trends.py)."""

    model_config = _STRICT
    #: trend window; the estimate uses the bucket points of the last ``window_s`` seconds
    window_s: PosSeconds = 600.0
    #: samples are reduced to one median per bucket of this length before the slope is taken
    bucket_s: PosSeconds = 15.0
    #: fewest bucket points for an estimate (12 x 15 s = 3 minutes of data)
    min_points: Annotated[int, Field(ge=3)] = 12
    #: the points must span at least this fraction of the window
    min_span_fraction: Annotated[float, Field(ge=0, le=1)] = 0.5
    #: a gap between points longer than this drops the older points (the trend restarts)
    gap_reset_s: PosSeconds = 180.0
    #: no estimate when the newest point is older than this
    stale_after_s: PosSeconds = 60.0
    #: Kendall's tau must reach this (in the slope's direction) for rising/falling
    min_tau: Annotated[float, Field(ge=0, le=1)] = 0.3
    #: once a pattern that uses a trend is raised, the trend keeps counting while the slope is
    #: beyond this fraction of the band (hysteresis for trend terms)
    hold_fraction: Annotated[float, Field(ge=0, le=1)] = 0.5
    params: dict[str, TrendParam] = Field(default_factory=_default_trend_params)

    @field_validator("params")
    @classmethod
    def _known(cls, v: dict[str, TrendParam]) -> dict[str, TrendParam]:
        _check_params(v, "params")
        return v

    @model_validator(mode="after")
    def _sizes(self) -> "TrendConfig":
        if self.bucket_s * self.min_points > self.window_s:
            raise ValueError(f"min_points ({self.min_points}) x bucket_s ({self.bucket_s}) "
                             f"must fit in window_s ({self.window_s})")
        if self.window_s / self.bucket_s > 400:
            raise ValueError("window_s / bucket_s must be at most 400 points (cost per "
                             "estimate grows with the square of the point count)")
        return self


# --------------------------------------------------------------------------- artifacts


class Span(BaseModel):
    model_config = _STRICT
    low: float
    high: float

    @model_validator(mode="after")
    def _ordered(self) -> "Span":
        if self.low >= self.high:
            raise ValueError(f"low ({self.low}) must be below high ({self.high})")
        return self


def _default_channels() -> dict[str, list[str]]:
    # A pressure channel and every value computed from it: a flush or zeroing of the channel
    # makes all of them wrong for its duration (derivations as in derive.py).
    return {
        "ABP": ["ABP_SYS", "ABP_DIA", "ABP_MEAN", "MAP", "SBP", "PP", "SVR", "SVRI", "SI",
                "MSI", "LVSWI"],
        "CVP": ["CVP", "SVR", "SVRI", "RVSWI"],
        "PAP": ["PAP_SYS", "PAP_DIA", "PAP_MEAN", "PVR", "RVSWI"],
        "PAWP": ["PAWP", "PVR", "LVSWI"],
        "NIBP": ["NIBP_SYS", "NIBP_DIA", "NIBP_MEAN"],
    }


class ArtifactConfig(BaseModel):
    """Values left out of trends, limits, patterns and fluid-challenge evaluation."""

    model_config = _STRICT
    #: note kinds that open an artifact span for their ``param`` (or ``note_all_channels``)
    note_kinds: list[Literal["line_flush", "zeroing", "sample_draw", "reposition"]] = Field(
        default_factory=lambda: ["line_flush", "zeroing", "sample_draw"])
    #: span length when the note gives no ``duration_s``
    note_span_s: Seconds = 60.0
    #: note kinds after which the trends of the note's channel restart (the reading's
    #: reference changed: a transducer levelled again)
    trend_reset_note_kinds: list[Literal["line_flush", "zeroing", "sample_draw",
                                         "reposition"]] = Field(
        default_factory=lambda: ["reposition"])
    #: channels a note without ``param`` concerns (the invasive, transducer-based ones)
    note_all_channels: list[str] = Field(
        default_factory=lambda: ["ABP", "CVP", "PAP", "PAWP"])
    #: channel -> parameters a flush/zeroing of it spoils (first entries: the measured ones)
    channels: dict[str, list[str]] = Field(default_factory=_default_channels)
    #: detect flush/zeroing signatures without a note
    auto_detect: bool = True
    #: a channel whose SYS - DIA is below this is flat (flush square wave, zeroing, damping)
    flat_pulse_pressure: dict[str, Annotated[float, Field(ge=0)]] = Field(
        default_factory=lambda: {"ABP": 5.0, "PAP": 2.0})
    #: values outside these ranges are flush or zero signatures, not physiology (mm[Hg]);
    #: tighter than ingest plausibility on purpose (common practice, from memory: a flush
    #: reads the pressure bag, about 300 mm[Hg]; a zeroing reads 0)
    signature_outside: dict[str, Span] = Field(default_factory=lambda: {
        "ABP_SYS": Span(low=30, high=260), "ABP_MEAN": Span(low=15, high=220),
        "PAP_MEAN": Span(low=3, high=80), "CVP": Span(low=-5, high=40)})
    #: a drop to about zero (|value| <= zero_band) by at least this step from the previous
    #: value is a zeroing signature (for mean-only channels such as CVP)
    zero_step: dict[str, Annotated[float, Field(gt=0)]] = Field(
        default_factory=lambda: {"CVP": 4.0})
    zero_band: Annotated[float, Field(ge=0)] = 1.0
    #: over-damped trace (air bubble, clot, kinked line): the pulse pressure falls below this
    #: fraction of its slow reference while the mean stays within damping_mean_tolerance of
    #: its own; systolic and diastolic are then wrong, the mean is not (common practice,
    #: from memory). Channels need SYS, DIA and MEAN values.
    damping_fraction: dict[str, Annotated[float, Field(gt=0, lt=1)]] = Field(
        default_factory=lambda: {"ABP": 0.75})
    damping_mean_tolerance: Annotated[float, Field(gt=0, lt=1)] = 0.15
    #: time constant of the slow references of pulse pressure and mean (exponential average)
    damping_reference_s: PosSeconds = 300.0
    #: what a damped trace spoils (the rest of the channel, its mean and what is computed
    #: from the mean, stays in use)
    damping_spoils: dict[str, list[str]] = Field(default_factory=lambda: {
        "ABP": ["ABP_SYS", "ABP_DIA", "SBP", "PP", "SI"]})
    #: values stay excluded this long after a signature was last seen (ringing, refill)
    post_hold_s: Seconds = 20.0
    #: a signature present longer than this (outside a noted span) is the technical condition
    #: ``artifact_suspected``
    suspected_after_s: Seconds = 20.0
    suspected_priority: Priority = "low"

    @model_validator(mode="after")
    def _consistent(self) -> "ArtifactConfig":
        for ch, plist in self.channels.items():
            _check_params(plist, f"channels.{ch}")
        unknown = [c for c in self.note_all_channels if c not in self.channels]
        unknown += [c for c in self.flat_pulse_pressure if c not in self.channels]
        unknown += [c for c in self.damping_fraction if c not in self.channels]
        for ch, plist in self.damping_spoils.items():
            _check_params(plist, f"damping_spoils.{ch}")
        if unknown:
            raise ValueError(f"channel(s) {unknown} are not defined in channels "
                             f"({list(self.channels)})")
        _check_params(self.signature_outside, "signature_outside")
        _check_params(self.zero_step, "zero_step")
        return self


# --------------------------------------------------------------------------- limits


class LimitRule(BaseModel):
    """Low/high limit on one parameter. Rule ids are ``<PARAM>_low`` and ``<PARAM>_high``."""

    model_config = _STRICT
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


def _default_limits() -> dict[str, LimitRule]:
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
    }


class LimitDefaults(BaseModel):
    """Used for a parameter that an ``admit`` message limits but the config does not."""

    model_config = _STRICT
    priority: Priority = "medium"
    delay_s: Seconds = 10.0
    hysteresis: Annotated[float, Field(ge=0)] = 0.0
    clear_delay_s: Seconds = 5.0


# --------------------------------------------------------------------------- patterns


class Term(BaseModel):
    """One condition of a pattern rule.

    ``param`` is a name or a list of alternatives (the first one that has data is used).
    ``trend`` asks for the trend direction; ``at_least`` / ``below`` ask for the level
    (the current valid value), with ``hysteresis`` applied while the alarm is present.
    """

    model_config = _STRICT
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
        _check_params(names, "param")
        if self.trend is None and self.at_least is None and self.below is None:
            raise ValueError("a term needs trend, at_least or below")
        return self

    @property
    def params(self) -> list[str]:
        return [self.param] if isinstance(self.param, str) else list(self.param)


class Tier(BaseModel):
    """A stronger form of a pattern: when its extra terms hold too, the priority is higher."""

    model_config = _STRICT
    priority: Priority
    terms: list[Term]


class PatternRule(BaseModel):
    model_config = _STRICT
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


def _default_patterns() -> dict[str, PatternRule]:
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


# --------------------------------------------------------------------------- fluid challenge


class FluidChallengeConfig(BaseModel):
    """A ``fluid_bolus`` note opens an evaluation: SV (or CO) before versus after the bolus."""

    model_config = _STRICT
    enabled: bool = True
    #: the first of these with a baseline is evaluated
    params: list[str] = Field(default_factory=lambda: ["SV", "SVI", "CO", "CI"])
    #: responsive when the parameter rises by at least this (percent of the baseline)
    responsive_change_pct: Annotated[float, Field(gt=0)] = 10.0
    #: baseline: median over this long before the note
    baseline_s: PosSeconds = 300.0
    min_baseline_points: Annotated[int, Field(ge=1)] = 4
    #: when the note gives no ``over_min``
    default_over_min: Annotated[float, Field(ge=0)] = 10.0
    #: the after-window starts this long after the end of the infusion ...
    after_delay_s: float = -60.0
    #: ... and lasts this long; the after value is its median
    after_window_s: PosSeconds = 180.0
    min_after_samples: Annotated[int, Field(ge=1)] = 10
    cvp_param: str = "CVP"

    @field_validator("params")
    @classmethod
    def _known(cls, v: list[str]) -> list[str]:
        if not v:
            raise ValueError("give at least one parameter")
        _check_params(v, "params")
        return v


# --------------------------------------------------------------------------- profile


def _default_profile_ranges() -> dict[str, Span]:
    # Typical adult ranges, critical care texts (from memory; docs/sources.md [marino2014])
    return {"CVP": Span(low=2, high=8), "PAWP": Span(low=6, high=12),
            "CI": Span(low=2.5, high=4.0), "SVR": Span(low=800, high=1200)}


class ProfileConfig(BaseModel):
    """Hemodynamic profile read-out: information, never a diagnosis."""

    model_config = _STRICT
    enabled: bool = True
    ranges: dict[str, Span] = Field(default_factory=_default_profile_ranges)
    #: a read-out must hold this long before it is announced (and so must its end)
    hold_s: Seconds = 120.0

    @field_validator("ranges")
    @classmethod
    def _complete(cls, v: dict[str, Span]) -> dict[str, Span]:
        missing = [p for p in ("CVP", "PAWP", "CI", "SVR") if p not in v]
        if missing:
            raise ValueError(f"ranges: missing {missing} (CVP, PAWP, CI and SVR are needed)")
        _check_params(v, "ranges")
        return v


# --------------------------------------------------------------------------- technical


def _default_feed_silent() -> dict[str, float]:
    # Continuous channels only (about 1 value a second from a gateway); intermittent ones
    # (cuff, wedge, thermodilution CO) have no expected interval and are not watched.
    return {p: 30.0 for p in ("HR", "PR", "ABP_SYS", "ABP_DIA", "ABP_MEAN", "CVP",
                              "PAP_SYS", "PAP_DIA", "PAP_MEAN", "SPO2", "RR")}


class TechnicalConfig(BaseModel):
    """Technical alarm conditions (IEC 60601-1-8 keeps them apart from physiological ones)."""

    model_config = _STRICT
    #: measured parameter -> seconds without a value after which its feed counts as silent
    feed_silent_after_s: dict[str, PosSeconds] = Field(default_factory=_default_feed_silent)
    feed_silent_priority: Priority = "low"
    #: a device that sent nothing for this long is silent (its feeds are then not listed)
    device_silent_after_s: PosSeconds = 30.0
    device_silent_priority: Priority = "medium"
    #: statuses that count as not valid, and how long before it is a condition
    not_valid_statuses: list[Literal["invalid", "questionable", "calibrating", "test"]] = Field(
        default_factory=lambda: ["invalid", "questionable"])
    not_valid_after_s: Seconds = 30.0
    not_valid_priority: Priority = "low"

    @field_validator("feed_silent_after_s")
    @classmethod
    def _measured(cls, v: dict[str, float]) -> dict[str, float]:
        bad = [p for p in v if p not in PARAMS]
        if bad:
            raise ValueError(f"unknown measured parameter(s) {bad}; expected names from "
                             + ", ".join(PARAMS))
        return v


# --------------------------------------------------------------------------- alarms


class AlarmConfig(BaseModel):
    """Alarm lifecycle (IEC 60601-1-8 terms: priority, latching, acknowledged, audio paused)."""

    model_config = _STRICT
    #: whether an alarm of a priority stays after its condition ended, until acknowledged
    latching: dict[Priority, bool] = Field(
        default_factory=lambda: {"high": True, "medium": False, "low": False})
    #: an acknowledged alarm whose condition is still present is announced again after this
    #: (None: stays silent until the condition ends)
    acknowledge_s: PosSeconds | None = 600.0
    #: audio pause length; an alarm still present afterwards is announced again
    audio_pause_s: PosSeconds = 120.0
    #: a medium alarm still present and not acknowledged this long becomes high priority
    #: (None: no escalation)
    escalate_medium_after_s: PosSeconds | None = 600.0
    escalate_categories: list[Literal["physiological", "technical"]] = Field(
        default_factory=lambda: ["physiological"])
    #: acknowledging a technical alarm clears it, and its silent feeds or devices are not
    #: watched again until they send (a removed line is not announced every few minutes)
    acknowledge_clears_technical: bool = True
    #: a condition delay matures on a clock tick (without a new sample) only if the last
    #: evaluation of the condition is at most this old
    tick_maturation_max_age_s: PosSeconds = 120.0

    @field_validator("latching")
    @classmethod
    def _all(cls, v: dict[str, bool]) -> dict[str, bool]:
        full = {"high": True, "medium": False, "low": False}
        full.update(v)
        return full


# --------------------------------------------------------------------------- root


class RulesConfig(BaseModel):
    """The ``[rules]`` table. ``RulesConfig()`` is the shipped default."""

    model_config = _STRICT
    enabled: bool = True
    trends: TrendConfig = Field(default_factory=TrendConfig)
    artifacts: ArtifactConfig = Field(default_factory=ArtifactConfig)
    limits: dict[str, LimitRule] = Field(default_factory=_default_limits)
    limit_defaults: LimitDefaults = Field(default_factory=LimitDefaults)
    patterns: dict[str, PatternRule] = Field(default_factory=_default_patterns)
    fluid_challenge: FluidChallengeConfig = Field(default_factory=FluidChallengeConfig)
    profile: ProfileConfig = Field(default_factory=ProfileConfig)
    technical: TechnicalConfig = Field(default_factory=TechnicalConfig)
    alarms: AlarmConfig = Field(default_factory=AlarmConfig)

    @field_validator("limits")
    @classmethod
    def _limit_params(cls, v: dict[str, LimitRule]) -> dict[str, LimitRule]:
        _check_params(v, "limits")
        return v

    @field_validator("patterns")
    @classmethod
    def _rule_ids(cls, v: dict[str, PatternRule]) -> dict[str, PatternRule]:
        bad = [k for k in v if not _RULE_ID.match(k)]
        if bad:
            raise ValueError(f"pattern rule id(s) {bad}: use 1-64 characters of a-z 0-9 _ "
                             "starting with a letter")
        return v

    @model_validator(mode="after")
    def _trended(self) -> "RulesConfig":
        trended = set(self.trends.params)
        problems = []
        for rid, pr in self.patterns.items():
            if not pr.enabled:
                continue
            for term in pr.terms + [t for tier in pr.tiers for t in tier.terms]:
                if term.trend is not None:
                    missing = [p for p in term.params if p not in trended]
                    if missing:
                        problems.append(f"patterns.{rid}: trend of {missing} is used but "
                                        "not in trends.params")
        if self.fluid_challenge.enabled:
            missing = [p for p in self.fluid_challenge.params if p not in trended]
            if missing:
                problems.append(f"fluid_challenge.params {missing} must be in trends.params "
                                "(the baseline is taken from the trend points)")
        if problems:
            raise ValueError("; ".join(problems))
        return self
