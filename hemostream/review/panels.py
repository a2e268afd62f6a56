"""The value panels of a bed page: which series each shows, and their data for drawing
(pure: from a bed's loaded rows and the configuration in force)."""

from __future__ import annotations

import statistics
from dataclasses import dataclass, field

from ..core.config import Config
from .limits import LimitLine, RefLine, limit_lines, ref_lines
from .periods import InfoEvent
from .queries import BedData


@dataclass(frozen=True)
class SeriesSpec:
    source: str          # obs | derived
    param: str
    label: str
    ink: int = 0
    width: float = 1.2
    dash: str = "-"


@dataclass(frozen=True)
class PanelSpec:
    key: str
    title: str
    unit: str
    series: tuple[SeriesSpec, ...]
    limit_params: tuple[str, ...]


PANELS: tuple[PanelSpec, ...] = (
    PanelSpec("arterial", "Arterial pressure", "mm[Hg]", (
        SeriesSpec("obs", "ABP_SYS", "systolic (line)", 0, 1.1),
        SeriesSpec("obs", "ABP_DIA", "diastolic (line)", 1, 1.0),
        SeriesSpec("obs", "ABP_MEAN", "mean (line)", 2, 1.8),
        SeriesSpec("obs", "NIBP_SYS", "systolic (cuff)", 0),
        SeriesSpec("obs", "NIBP_DIA", "diastolic (cuff)", 1),
        SeriesSpec("obs", "NIBP_MEAN", "mean (cuff)", 2),
        SeriesSpec("derived", "MAP", "mean (computed)", 2, 1.4, "--"),
    ), ("SBP", "MAP", "ABP_SYS", "ABP_MEAN", "NIBP_SYS", "NIBP_MEAN")),
    PanelSpec("hr", "Heart rate", "/min", (
        SeriesSpec("obs", "HR", "HR", 0, 1.2),
        SeriesSpec("obs", "PR", "pulse rate", 3, 0.9, "--"),
    ), ("HR", "PR")),
    PanelSpec("cvp", "Central venous pressure", "mm[Hg]", (
        SeriesSpec("obs", "CVP", "CVP", 0, 1.2),
    ), ("CVP",)),
    PanelSpec("output", "Cardiac output and index", "CO L/min, CI L/min/m2", (
        SeriesSpec("obs", "CO", "CO measured", 0, 1.2),
        SeriesSpec("derived", "CO", "CO computed", 0, 1.2, "--"),
        SeriesSpec("derived", "CI", "CI", 2, 1.6),
    ), ("CO", "CI")),
    PanelSpec("svr", "Systemic vascular resistance", "dyn.s/cm5", (
        SeriesSpec("derived", "SVR", "SVR", 0, 1.3),
    ), ("SVR",)),
    PanelSpec("si", "Shock index", "HR / systolic", (
        SeriesSpec("derived", "SI", "SI", 0, 1.3),
    ), ("SI",)),
)
PANEL_KEYS = ("alarms",) + tuple(p.key for p in PANELS)


@dataclass
class Series:
    label: str
    t: list[float]
    v: list[float]
    style: str = "line"        # line | points
    ink: int = 0
    width: float = 1.2
    dash: str = "-"
    gap_s: float = 30.0         # a longer gap between values breaks the line
    steps: bool = False         # stored on change: the value holds until the next one
    hover: str = ""


@dataclass
class PanelData:
    key: str
    title: str
    unit: str
    series: list[Series] = field(default_factory=list)
    invalid: list[tuple[float, float, str]] = field(default_factory=list)   # t, v, status
    limits: list[LimitLine] = field(default_factory=list)
    refs: list[RefLine] = field(default_factory=list)
    fluid: list[InfoEvent] = field(default_factory=list)


#: parameters read for the panels
OBS_PARAMS = sorted({s.param for p in PANELS for s in p.series if s.source == "obs"})
DER_PARAMS = sorted({s.param for p in PANELS for s in p.series if s.source == "derived"})


def _median_gap(ts: list[float]) -> float:
    if len(ts) < 2:
        return 0.0
    return statistics.median(b - a for a, b in zip(ts, ts[1:]))


def panel_data(spec: PanelSpec, bd: BedData, cfg: Config, t0: float, t1: float) -> PanelData:
    pd = PanelData(spec.key, spec.title, spec.unit)
    for s in spec.series:
        if s.source == "obs":
            rows = bd.obs.get(s.param, [])
            valid = [(t, v) for t, v, st in rows if st == "valid"]
            pd.invalid += [(t, v, st) for t, v, st in rows if st != "valid"]
            gap = _median_gap([t for t, _ in valid])
            style = "points" if gap >= 60 else "line"     # cuff, thermodilution
            gap_s = max(30.0, 3 * gap)
        else:
            valid = [(t, v) for t, v, _u, _i in bd.derived.get(s.param, [])]
            style, gap_s = "line", max(180.0, 2.5 * cfg.store.derived_every_s)
        if not valid:
            continue
        pd.series.append(Series(s.label, [t for t, _ in valid], [v for _, v in valid],
                                style=style, ink=s.ink, width=s.width, dash=s.dash,
                                gap_s=gap_s, steps=s.source == "derived"))
    pd.limits = limit_lines(cfg, bd.admissions, spec.limit_params, t0, t1)
    pd.refs = ref_lines(cfg, spec.limit_params)
    if spec.key == "output":
        pd.fluid = [e for e in bd.info if e.rule == "fluid_challenge" and e.transition == "result"]
    return pd
