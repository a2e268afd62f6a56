"""Fluid-challenge evaluation: configuration, and the evaluation a ``fluid_bolus`` note opens.

Two ways, by how the output is measured (docs/rules.md, "Fluid challenge"):

- *continuous output* (the first configured parameter of SV, SVI, CO, CI that has at least
  ``min_baseline_points`` trend points in the ``baseline_s`` before the bolus): the baseline
  is the median of those trend points, the after value the median of its valid, non-artifact
  values in a window after the infusion;
- *intermittent output* (no such trend, but a measurement of one of them at most
  ``intermittent_baseline_s`` before the bolus, e.g. thermodilution): the baseline is that
  measurement, and the evaluation asks for and waits up to ``intermittent_wait_s`` for the
  first measurement made after the window start; it compares those two measurements and says
  which (value and measurement time of each). Values re-derived between measurements do not
  exist (see the processor's ``OUTPUT_PARAMS``), so one measurement is never counted many
  times.

Responsive when the rise reaches ``responsive_change_pct`` of the baseline (common practice: a
10 % rise of SV; Monnet X et al., Ann Intensive Care 2016;6:111, from memory). A new bolus
before the window ended cuts the open one short. The CVP change is reported only when the
CVP transducer stayed put: a zeroing or reposition note on the CVP channel during the
evaluation, or a step of the CVP level (``cvp_step_mmhg`` between the medians of two
consecutive 10-sample runs: a moved transducer shifts the reading at once, filling takes
minutes; common practice), withholds it with the reason. The results are information events,
never alarms. Pure: no I/O.
"""

from __future__ import annotations

from collections import deque
from typing import Annotated, Any, Literal, Mapping

from pydantic import BaseModel, Field, field_validator

from ..alarms import RuleEvent
from .common import FLUID, STRICT, PosSeconds, check_params, median
from .state import BedState, Shared

__all__ = ["FluidChallengeConfig", "Eval", "FluidChallenge"]

NoteKind = Literal["zeroing", "reposition", "line_flush", "sample_draw"]
_OFFSET_NOTES: tuple[NoteKind, ...] = ("zeroing", "reposition")

#: samples per half of the CVP step test (two consecutive runs are compared)
_STEP_RUN = 10


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
    #: intermittent output: a measurement at most this long before the bolus is the baseline
    #: (the maximum age of a thermodilution CO, docs/wire-format.md)
    intermittent_baseline_s: PosSeconds = 900.0
    #: ... and the evaluation waits this long after the window start for the measurement
    #: after the bolus
    intermittent_wait_s: PosSeconds = 1800.0
    #: a shift of the CVP level larger than this (mm[Hg]) between two consecutive runs of 10
    #: samples is a moved or re-zeroed transducer, not filling (common practice)
    cvp_step_mmhg: Annotated[float, Field(gt=0)] = 3.0
    #: notes that move the CVP reference (on the CVP channel, or without ``param``)
    cvp_offset_note_kinds: list[NoteKind] = Field(
        default_factory=lambda: list(_OFFSET_NOTES))

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
                 "win_start", "win_end", "vals", "cvp_vals", "mode", "baseline_time",
                 "baseline_points", "cvp_offset", "cvp_recent")

    def __init__(self, aid: str, bolus_t: float, volume_ml: float | None, over_min: float,
                 param: str, baseline: float, cvp_baseline: float | None, win_start: float,
                 win_end: float, mode: str = "trend", baseline_time: float | None = None,
                 baseline_points: int = 0) -> None:
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
        #: "trend" (continuous output) or "measurement" (intermittent output)
        self.mode = mode
        self.baseline_time = baseline_time
        self.baseline_points = baseline_points
        #: why the CVP change is not comparable (a moved transducer), or None
        self.cvp_offset: str | None = None
        self.cvp_recent: deque[float] = deque(maxlen=2 * _STEP_RUN)


class FluidChallenge:
    """Opens, feeds and closes the fluid-challenge evaluations of the beds."""

    def __init__(self, sh: Shared) -> None:
        self.sh = sh
        self.cfg = sh.cfg
        self.params = tuple(self.cfg.fluid_challenge.params)

    def on_values(self, b: BedState, t: float, fresh: dict[str, float], new: frozenset[str],
                  excluded: frozenset[str], ev: list[RuleEvent],
                  times: Mapping[str, float] | None = None) -> None:
        """Keep the latest output measurements; collect the window's values; close an
        evaluation whose window has passed or whose post-bolus measurement came in."""
        meas = b.fc_meas
        for p in self.params:
            if p in new and p not in excluded:
                meas[p] = ((times or {}).get(p, t), fresh[p])
        fc = b.fc
        if fc is None:
            return
        fcc = self.cfg.fluid_challenge
        cp = fcc.cvp_param
        cvp_new = cp in new and cp not in excluded
        if cvp_new and fc.cvp_offset is None:
            r = fc.cvp_recent
            r.append(fresh[cp])
            if len(r) == r.maxlen:
                vals = list(r)
                shift = median(vals[_STEP_RUN:]) - median(vals[:_STEP_RUN])
                if abs(shift) > fcc.cvp_step_mmhg:
                    fc.cvp_offset = (f"CVP level stepped by {shift:+.1f} mm[Hg] within "
                                     f"{2 * _STEP_RUN} samples (a moved or re-zeroed "
                                     "transducer)")
        if t > fc.win_end:
            ev += self.finish(b, t)
        elif t >= fc.win_start:
            if cvp_new:
                fc.cvp_vals.append(fresh[cp])
            if fc.param in new and fc.param not in excluded:
                if fc.mode == "measurement":
                    mt = (times or {}).get(fc.param, t)
                    if mt >= fc.win_start:
                        fc.vals.append(fresh[fc.param])
                        ev += self.finish(b, t, after_time=mt)
                else:
                    fc.vals.append(fresh[fc.param])

    def note(self, b: BedState, t: float, kind: str, param: str | None) -> None:
        """A note that may move the CVP reference during an open evaluation."""
        fc = b.fc
        fcc = self.cfg.fluid_challenge
        if fc is None or kind not in fcc.cvp_offset_note_kinds:
            return
        if param is None or param == fcc.cvp_param:
            fc.cvp_offset = f"{kind} note on the CVP channel during the evaluation"

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
        mode = "trend"
        btime = None
        for p in self.params:
            tr = b.trends.get(p)
            if tr is None:
                continue
            pts = tr.points_between(t - fcc.baseline_s, t)
            if len(pts) >= fcc.min_baseline_points:
                param, baseline, npts = p, median(pts), len(pts)
                break
        if param is None:
            # intermittent output: the latest measurement before the bolus is the baseline
            for p in self.params:
                m = b.fc_meas.get(p)
                if m is not None and t - fcc.intermittent_baseline_s <= m[0] <= t:
                    param, baseline, btime, npts, mode = p, m[1], m[0], 1, "measurement"
                    we = ws + fcc.intermittent_wait_s
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
                             "before the bolus, and no measurement of them in the "
                             f"{fcc.intermittent_baseline_s:g} s before it"}
            b.fc_last = res
            ev.append(RuleEvent(t, b.key, aid, FLUID, "info", "information", "result", None,
                                res))
            return ev
        b.fc = Eval(aid, t, volume_ml, over, param, baseline, cvp_base, ws, we, mode, btime,
                    npts)
        self.sh.schedule(we, "fluid", b.key, aid)
        details = {**base, "param": param, "baseline": baseline, "baseline_points": npts,
                   "cvp_baseline": cvp_base, "window_start": ws, "window_end": we,
                   "method": mode}
        if mode == "measurement":
            details.update(
                baseline_time=btime,
                request=f"measure {param} after the infusion: the evaluation compares the "
                        f"first {param} measurement made after the window start with the "
                        f"one before the bolus, and waits for it until the window end")
        ev.append(RuleEvent(t, b.key, aid, FLUID, "info", "information", "opened", baseline,
                            details))
        return ev

    def on_timer(self, b: BedState, aid: str, now: float) -> list[RuleEvent]:
        if b.fc is not None and b.fc.id == aid:
            return self.finish(b, now)
        return []

    def finish(self, b: BedState, t: float, interrupted: bool = False,
               after_time: float | None = None) -> list[RuleEvent]:
        fc = b.fc
        if fc is None:
            return []
        b.fc = None
        fcc = self.cfg.fluid_challenge
        res: dict[str, Any] = {
            "bolus_time": fc.bolus_t, "volume_ml": fc.volume_ml, "over_min": fc.over_min,
            "param": fc.param, "baseline": fc.baseline, "threshold_pct":
            fcc.responsive_change_pct, "window_start": fc.win_start, "window_end": fc.win_end,
            "after_samples": len(fc.vals), "cvp_baseline": fc.cvp_baseline,
            "method": fc.mode}
        need = 1 if fc.mode == "measurement" else fcc.min_after_samples
        value = None
        if interrupted and len(fc.vals) < need:
            res.update(outcome="not_evaluable", reason="a new fluid bolus began before the "
                                                       "window ended")
        elif fc.mode == "measurement" and not fc.vals:
            res.update(outcome="not_evaluable",
                       reason=f"no {fc.param} measurement after the infusion by the window "
                              f"end ({fcc.intermittent_wait_s:g} s after the window start)")
        elif len(fc.vals) < need:
            res.update(outcome="not_evaluable",
                       reason=f"{len(fc.vals)} valid {fc.param} values in the window "
                              f"(at least {fcc.min_after_samples} needed)")
        else:
            after = median(fc.vals) if fc.mode == "trend" else fc.vals[0]
            change = (after - fc.baseline) / fc.baseline * 100.0
            value = change
            res.update(after=after, change_pct=change,
                       responsive=change >= fcc.responsive_change_pct - 1e-9,
                       outcome="responsive" if change >= fcc.responsive_change_pct - 1e-9
                       else "not_responsive")
            if fc.mode == "measurement":
                res["compared"] = [
                    {"param": fc.param, "value": fc.baseline, "time": fc.baseline_time,
                     "role": "before the bolus"},
                    {"param": fc.param, "value": after, "time": after_time,
                     "role": "after the infusion"}]
            else:
                res["compared"] = [
                    {"param": fc.param, "value": fc.baseline, "role": "before the bolus",
                     "trend_points": fc.baseline_points},
                    {"param": fc.param, "value": after, "role": "after the infusion",
                     "samples": len(fc.vals)}]
            if interrupted:
                res["note"] = "window cut short by a new fluid bolus"
            if fc.cvp_offset is not None:
                res.update(cvp_after=None, cvp_change=None,
                           cvp_note=f"CVP change not reported: {fc.cvp_offset}")
            elif fc.cvp_vals and fc.cvp_baseline is not None:
                ca = median(fc.cvp_vals)
                res.update(cvp_after=ca, cvp_change=ca - fc.cvp_baseline)
            else:
                res.update(cvp_after=None, cvp_change=None)
        b.fc_last = res
        return [RuleEvent(t, b.key, fc.id, FLUID, "info", "information", "result", value, res)]
