"""Configuration of the rules layer: the root :class:`RulesConfig`, and every slice re-exported
from the feature module that owns it (trends: :mod:`.trending`, artifacts, limits, patterns,
fluid challenge: :mod:`.fluid`, profile, technical conditions; the alarm lifecycle:
:mod:`..alarms`).

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

from pydantic import BaseModel, Field, field_validator, model_validator

from ..alarms import AlarmConfig
from .artifacts import ArtifactConfig
from .common import (DERIVED_PARAMS, KNOWN_PARAMS, RULE_ID, STRICT, PosSeconds, Priority,
                     Seconds, Span, check_params)
from .fluid import FluidChallengeConfig
from .limits import LimitDefaults, LimitRule, default_limits
from .patterns import PatternRule, Term, Tier, default_patterns
from .profile import ProfileConfig
from .technical import TechnicalConfig
from .trending import TrendConfig, TrendParam

__all__ = ["RulesConfig", "AlarmConfig", "ArtifactConfig", "FluidChallengeConfig",
           "LimitDefaults", "LimitRule", "PatternRule", "ProfileConfig", "Span",
           "TechnicalConfig", "Term", "Tier", "TrendConfig", "TrendParam", "Priority",
           "Seconds", "PosSeconds", "DERIVED_PARAMS", "KNOWN_PARAMS"]


class RulesConfig(BaseModel):
    """The ``[rules]`` table. ``RulesConfig()`` is the shipped default."""

    model_config = STRICT
    enabled: bool = True
    trends: TrendConfig = Field(default_factory=TrendConfig)
    artifacts: ArtifactConfig = Field(default_factory=ArtifactConfig)
    limits: dict[str, LimitRule] = Field(default_factory=default_limits)
    limit_defaults: LimitDefaults = Field(default_factory=LimitDefaults)
    patterns: dict[str, PatternRule] = Field(default_factory=default_patterns)
    fluid_challenge: FluidChallengeConfig = Field(default_factory=FluidChallengeConfig)
    profile: ProfileConfig = Field(default_factory=ProfileConfig)
    technical: TechnicalConfig = Field(default_factory=TechnicalConfig)
    alarms: AlarmConfig = Field(default_factory=AlarmConfig)

    @field_validator("limits")
    @classmethod
    def _limit_params(cls, v: dict[str, LimitRule]) -> dict[str, LimitRule]:
        check_params(v, "limits")
        return v

    @field_validator("patterns")
    @classmethod
    def _rule_ids(cls, v: dict[str, PatternRule]) -> dict[str, PatternRule]:
        bad = [k for k in v if not RULE_ID.match(k)]
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
