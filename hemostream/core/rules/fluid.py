"""Fluid-challenge evaluation: configuration, and the evaluation a ``fluid_bolus`` note opens.

The baseline is the median of the first configured parameter (SV, SVI, CO, CI) that has
enough trend points before the bolus; the after value is the median of its valid,
non-artifact values in a window after the infusion. Responsive when the rise reaches
``responsive_change_pct`` of the baseline (common practice: a 10 % rise of SV; Monnet X et
al., Ann Intensive Care 2016;6:111, from memory). A new bolus before the window ended cuts
the open one short. The results are information events, never alarms. Pure: no I/O.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BaseModel, Field, field_validator

from ..alarms import RuleEvent
from .common import FLUID, STRICT, PosSeconds, check_params, median
from .state import BedState, Shared

__all__ = ["FluidChallengeConfig", "Eval", "FluidChallenge"]


# --------------------------------------------------------------------------- configuration


class FluidChallengeConfig(BaseModel):
    """A ``fluid_bolus`` note opens an evaluation: SV (or CO) before versus after the bolus."""

    model_config = STRICT
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
        check_params(v, "params")
        return v


# --------------------------------------------------------------------------- evaluation


class Eval:
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


class FluidChallenge:
    """Opens, feeds and closes the fluid-challenge evaluations of the beds."""

    def __init__(self, sh: Shared) -> None:
        self.sh = sh
        self.cfg = sh.cfg
        self.params = tuple(self.cfg.fluid_challenge.params)

    def on_values(self, b: BedState, t: float, fresh: dict[str, float], new: frozenset[str],
                  excluded: frozenset[str], ev: list[RuleEvent]) -> None:
        """Collect the window's values; close an evaluation whose window has passed."""
        fc = b.fc
        if fc is not None:
            if t > fc.win_end:
                ev += self.finish(b, t)
            elif t >= fc.win_start:
                if fc.param in new and fc.param not in excluded:
                    fc.vals.append(fresh[fc.param])
                cp = self.cfg.fluid_challenge.cvp_param
                if cp in new and cp not in excluded:
                    fc.cvp_vals.append(fresh[cp])

    def open(self, b: BedState, t: float, volume_ml: float | None,
             over_min: float | None) -> list[RuleEvent]:
        fcc = self.cfg.fluid_challenge
        ev: list[RuleEvent] = []
        if b.fc is not None:
            ev += self.finish(b, t, interrupted=True)
        over = fcc.default_over_min if over_min is None else float(over_min)
        end = t + over * 60.0
        ws = max(t, end + fcc.after_delay_s)
        we = ws + fcc.after_window_s
        param = baseline = None
        npts = 0
        for p in self.params:
            tr = b.trends.get(p)
            if tr is None:
                continue
            pts = tr.points_between(t - fcc.baseline_s, t)
            if len(pts) >= fcc.min_baseline_points:
                param, baseline, npts = p, median(pts), len(pts)
                break
        cvp_base = None
        ctr = b.trends.get(fcc.cvp_param)
        if ctr is not None:
            cp = ctr.points_between(t - fcc.baseline_s, t)
            if cp:
                cvp_base = median(cp)
        aid = self.sh.info_id(b.key, FLUID)
        base = {"bolus_time": t, "volume_ml": volume_ml, "over_min": over,
                "threshold_pct": fcc.responsive_change_pct}
        if param is None or baseline is None or baseline <= 0:
            res = {**base, "outcome": "not_evaluable",
                   "reason": f"no baseline: fewer than {fcc.min_baseline_points} trend points "
                             f"of {', '.join(self.params)} in the {fcc.baseline_s:g} s "
                             "before the bolus"}
            b.fc_last = res
            ev.append(RuleEvent(t, b.key, aid, FLUID, "info", "information", "result", None,
                                res))
            return ev
        b.fc = Eval(aid, t, volume_ml, over, param, baseline, cvp_base, ws, we)
        self.sh.schedule(we, "fluid", b.key, aid)
        ev.append(RuleEvent(t, b.key, aid, FLUID, "info", "information", "opened", baseline,
                            {**base, "param": param, "baseline": baseline,
                             "baseline_points": npts, "cvp_baseline": cvp_base,
                             "window_start": ws, "window_end": we}))
        return ev

    def on_timer(self, b: BedState, aid: str, now: float) -> list[RuleEvent]:
        if b.fc is not None and b.fc.id == aid:
            return self.finish(b, now)
        return []

    def finish(self, b: BedState, t: float, interrupted: bool = False) -> list[RuleEvent]:
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
            after = median(fc.vals)
            change = (after - fc.baseline) / fc.baseline * 100.0
            value = change
            res.update(after=after, change_pct=change,
                       responsive=change >= fcc.responsive_change_pct - 1e-9,
                       outcome="responsive" if change >= fcc.responsive_change_pct - 1e-9
                       else "not_responsive")
            if interrupted:
                res["note"] = "window cut short by a new fluid bolus"
            if fc.cvp_vals and fc.cvp_baseline is not None:
                ca = median(fc.cvp_vals)
                res.update(cvp_after=ca, cvp_change=ca - fc.cvp_baseline)
            else:
                res.update(cvp_after=None, cvp_change=None)
        b.fc_last = res
        return [RuleEvent(t, b.key, fc.id, FLUID, "info", "information", "result", value, res)]
