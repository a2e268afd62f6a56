"""Hemodynamic profile read-out: configuration, the classification, and its announcement.

Information for the clinician, never a diagnosis: the read-out names the pattern the levels
of CVP, PAWP, CI and SVR are consistent with, once it has held for ``hold_s``. Pure: no I/O.
"""

from __future__ import annotations

from typing import Mapping

from pydantic import BaseModel, Field, field_validator

from ..alarms import RuleEvent
from .common import DELAY_TOLERANCE_S, PROFILE, STRICT, Seconds, Span, check_params
from .state import BedState, Shared
from .trending import Trending

__all__ = ["ProfileConfig", "PROFILE_TEXT", "PROFILE_INPUTS", "classify", "Profile"]

PROFILE_TEXT = {
    "hypovolemic": "consistent with a hypovolemic pattern",
    "cardiogenic": "consistent with a cardiogenic pattern",
    "obstructive": "consistent with an obstructive pattern",
    "cardiogenic_or_obstructive": "consistent with a cardiogenic or obstructive pattern "
                                  "(no PAWP to tell them apart)",
    "distributive": "consistent with a distributive pattern",
}
PROFILE_INPUTS = ("CVP", "PAWP", "CI", "SVR")


# --------------------------------------------------------------------------- configuration


def _default_profile_ranges() -> dict[str, Span]:
    # Typical adult ranges, critical care texts (from memory; docs/sources.md [marino2014])
    return {"CVP": Span(low=2, high=8), "PAWP": Span(low=6, high=12),
            "CI": Span(low=2.5, high=4.0), "SVR": Span(low=800, high=1200)}


class ProfileConfig(BaseModel):
    """Hemodynamic profile read-out: information, never a diagnosis."""

    model_config = STRICT
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
        check_params(v, "ranges")
        return v


# --------------------------------------------------------------------------- read-out


#: CVP / PAWP above this: right-sided filling backing up (right-ventricular involvement;
#: Lopez-Sendon J et al., Circulation 1981;64:515, RA/PCWP >= 0.8 - from memory)
RIGHT_LEFT_RATIO = 0.8


def classify(ranges: Mapping[str, tuple[float, float]],
             levels: Mapping[str, float | None], cvp_rising: bool = False) -> str | None:
    """Profile read-out from levels of CVP, PAWP, CI and SVR (None where absent), against
    ``ranges`` (parameter -> (low, high) of the typical range).

    Common practice (critical care teaching; docs/sources.md): hypovolemic
    (low filling pressures, low CI, high SVR), cardiogenic (high PAWP, low CI, high SVR),
    obstructive (high CVP with PAWP not high, low CI, high SVR), distributive (low SVR,
    CI normal or high). Without PAWP a high CVP with low CI and high SVR cannot tell
    cardiogenic from obstructive and says so.

    Never hypovolemic when the CVP is high, rising (``cvp_rising``, its trend) or high
    relative to the PAWP (CVP / PAWP above :data:`RIGHT_LEFT_RATIO`): a venous side that fills
    while output falls is a pump that fails, and "hypovolemic" would invite fluid that can
    harm. Such levels get no read-out unless a high filling pressure names one.
    """
    ci, svr = levels.get("CI"), levels.get("SVR")
    if ci is None or svr is None:
        return None
    cvp, pawp = levels.get("CVP"), levels.get("PAWP")

    def cls(v: float | None, p: str) -> str | None:
        if v is None:
            return None
        lo, hi = ranges[p]
        return "low" if v < lo else "high" if v > hi else "normal"

    c_ci, c_svr, c_cvp, c_pawp = cls(ci, "CI"), cls(svr, "SVR"), cls(cvp, "CVP"), \
        cls(pawp, "PAWP")
    if c_svr == "low" and c_ci != "low":
        return "distributive"
    if c_ci == "low" and c_svr == "high":
        fill = [x for x in (c_cvp, c_pawp) if x is not None]
        right_backing_up = cvp_rising or (
            cvp is not None and pawp is not None and pawp > 0
            and cvp / pawp > RIGHT_LEFT_RATIO)
        if fill and "low" in fill and "high" not in fill and not right_backing_up:
            return "hypovolemic"
        if c_pawp == "high":
            return "cardiogenic"
        if c_cvp == "high":
            return "obstructive" if c_pawp is not None else "cardiogenic_or_obstructive"
    return None


class Profile:
    """Announces a bed's profile read-out when it changed and held for ``hold_s``."""

    def __init__(self, sh: Shared, trending: Trending) -> None:
        self.sh = sh
        self.cfg = sh.cfg
        self.trending = trending
        self.ranges = {p: (s.low, s.high) for p, s in self.cfg.profile.ranges.items()}

    def on_values(self, b: BedState, t: float, fresh: dict[str, float], new: frozenset[str],
                  changed: list[str], excluded: frozenset[str], ev: list[RuleEvent]) -> None:
        """Levels come from the trend points: evaluate only when a bucket closed (or a PAWP
        reading, which is intermittent, came in)."""
        if self.cfg.profile.enabled and (changed or "PAWP" in new):
            for p in PROFILE_INPUTS:
                if p in changed or (p == "PAWP" and p in new):
                    self._evaluate(b, t, fresh, excluded, ev)
                    break

    def _evaluate(self, b: BedState, t: float, fresh: dict[str, float],
                  excluded: frozenset[str], ev: list[RuleEvent]) -> None:
        levels = {p: self.trending.robust_level(b, p, t, fresh, excluded)
                  for p in PROFILE_INPUTS}
        cls = classify(self.ranges, levels, self._cvp_rising(b, t))
        if cls == b.profile:
            b.cand = None
            b.cand_since = None
            return
        if cls != b.cand or b.cand_since is None:
            b.cand = cls
            b.cand_since = t
            b.cand_levels = levels       # levels at the start of the candidate
            if self.cfg.profile.hold_s > 0:
                self.sh.schedule(t + self.cfg.profile.hold_s, "profile", b.key, "", b.timers)
                return
        self._outcome(b, t, levels, ev)

    def _cvp_rising(self, b: BedState, t: float) -> bool:
        tr = b.trends.get("CVP")
        r = tr.reading(t) if tr is not None else None
        if r is None or "CVP" not in self.trending.bands:
            return False
        sa, sr = self.trending.bands["CVP"]
        return r.direction(sa, sr, self.cfg.trends.min_tau) == "rising"

    def on_timer(self, b: BedState, now: float, ev: list[RuleEvent]) -> None:
        if b.cand_since is None or now - b.last_t > self.cfg.alarms.tick_maturation_max_age_s:
            return
        self._outcome(b, now, None, ev)

    def _outcome(self, b: BedState, t: float, levels: dict | None,
                 ev: list[RuleEvent]) -> None:
        if b.cand_since is None or t - b.cand_since < self.cfg.profile.hold_s - DELAY_TOLERANCE_S:
            return
        b.profile = b.cand
        b.cand = None
        b.cand_since = None
        if levels is None:
            levels = b.cand_levels
        text = PROFILE_TEXT.get(b.profile) if b.profile else None
        ev.append(RuleEvent(
            t, b.key, self.sh.info_id(b.key, PROFILE), PROFILE, "info", "information",
            "profile", None,
            {"profile": b.profile, "text": text,
             "note": "information for the clinician, not a diagnosis",
             "levels": levels,
             "ranges": {p: list(r) for p, r in self.ranges.items()}}))
