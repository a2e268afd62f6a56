"""Trends in the rules engine: configuration, feeding each bed's robust trends with the new
values that are not artifacts, and reading them out (directions, levels).

The estimator itself is :class:`..trends.RobustTrend` (Theil-Sen slope over bucket points,
each bucket point the interquartile, i.e. 25 % trimmed, mean of the bucket). Pure: no I/O.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BaseModel, Field, field_validator, model_validator

from ..trends import RobustTrend
from .common import STRICT, PosSeconds, check_params
from .state import BedState

__all__ = ["TrendParam", "TrendConfig", "Trending"]


# --------------------------------------------------------------------------- configuration


class TrendParam(BaseModel):
    """Which parameters get a trend, and the band inside which a slope reads as steady.

    The band is ``max(steady_abs, steady_rel * |level|)`` per 10 minutes, where level is the
    median of the window's points.
    """

    model_config = STRICT
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
        "PAP_DIA": a(steady_abs=2.0, step_reset=6.0),    # mm[Hg]
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
    """Robust windowed trends: Theil-Sen slope over bucket points, each the interquartile
    (25 % trimmed) mean of its bucket's samples (see trends.py)."""

    model_config = STRICT
    #: trend window; the estimate uses the bucket points of the last ``window_s`` seconds
    window_s: PosSeconds = 600.0
    #: samples are reduced to one point per bucket of this length (their interquartile mean,
    #: i.e. the 25 % trimmed mean) before the slope is taken
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
        check_params(v, "params")
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


# --------------------------------------------------------------------------- engine side


class Trending:
    """Feeds and reads the trends of the beds."""

    def __init__(self, cfg: Any) -> None:
        self.cfg = cfg
        tc = cfg.trends
        self.params = tuple(tc.params)
        #: parameter -> (steady_abs, steady_rel)
        self.bands = {p: (c.steady_abs, c.steady_rel) for p, c in tc.params.items()}

    def feed(self, b: BedState, t: float, fresh: dict[str, float], new: frozenset[str],
             excluded: frozenset[str]) -> list[str]:
        """Add the new, not excluded values; return the parameters whose bucket closed."""
        changed: list[str] = []
        tc = self.cfg.trends
        trends = b.trends
        for p in self.params:
            if p in new and p not in excluded:
                tr = trends.get(p)
                if tr is None:
                    tr = trends[p] = RobustTrend(tc.window_s, tc.bucket_s, tc.min_points,
                                                 tc.min_span_fraction, tc.gap_reset_s,
                                                 tc.stale_after_s, tc.params[p].step_reset)
                if tr.update(t, fresh[p]):
                    changed.append(p)
        return changed

    def robust_level(self, b: BedState, p: str, t: float, fresh: dict[str, float],
                     excluded: frozenset[str]) -> float | None:
        """The level of ``p``: its latest bucket point where trended and recent (robust to
        single noisy samples), else the current value unless it is an artifact."""
        tr = b.trends.get(p)
        if tr is not None:
            lp = tr.last_point()
            if lp is not None and t - lp[0] <= 2 * self.cfg.trends.bucket_s:
                return lp[1]
        if p in excluded:
            return None
        return fresh.get(p)

    def view(self, b: BedState) -> dict[str, dict]:
        """Per trended parameter: direction, slope per 10 minutes, tau, points."""
        tc = self.cfg.trends
        trends: dict[str, dict] = {}
        for p in self.params:
            tr = b.trends.get(p)
            if tr is None:
                continue
            r = tr.reading(b.last_t)
            if r is None:
                trends[p] = {"direction": None, "slope_per_10min": None}
            else:
                sa, sr = self.bands[p]
                trends[p] = {"direction": r.direction(sa, sr, tc.min_tau),
                             "slope_per_10min": r.slope_per_10min, "tau": r.tau,
                             "points": r.points}
        return trends

    def directions(self, b: BedState) -> dict[str, str]:
        tc = self.cfg.trends
        out: dict[str, str] = {}
        for p, tr in b.trends.items():
            r = tr.reading(b.last_t)
            if r is not None:
                sa, sr = self.bands[p]
                out[p] = r.direction(sa, sr, tc.min_tau)
        return out
