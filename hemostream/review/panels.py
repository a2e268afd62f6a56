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
    #: stretches of time when a value of the panel was not ok: (from, to, qualities, params)
    quality: list[tuple[float, float, str, str]] = field(default_factory=list)


#: parameters read for the panels
OBS_PARAMS = sorted({s.param for p in PANELS for s in p.series if s.source == "obs"})
DER_PARAMS = sorted({s.param for p in PANELS for s in p.series if s.source == "derived"})


def _median_gap(ts: list[float]) -> float:
    if len(ts) < 2:
        return 0.0
    return statistics.median(b - a for a, b in zip(ts, ts[1:]))


def panel_data(spec: PanelSpec, bd: BedData, cfg: Config, t0: float, t1: float) -> PanelData:
    pd = PanelData(spec.key, spec.title, spec.unit)
    spans: list[tuple[float, float, str, str]] = []
    for s in spec.series:
        if s.source == "obs":
            rows = bd.obs.get(s.param, [])
            # a value that is not ok (a status, an artifact) is marked, not drawn as a line
            valid = [(t, v) for t, v, st, q in rows if q == "ok"]
            pd.invalid += [(t, v, st if st != "valid" else q) for t, v, st, q in rows
                           if q != "ok"]
            gap = _median_gap([t for t, _ in valid])
            style = "points" if gap >= 60 else "line"     # cuff, thermodilution
            gap_s = max(30.0, 3 * gap)
            spans += not_ok_spans([(t, q) for t, _v, _st, q in rows], s.param, gap_s)
        else:
            drows = bd.derived.get(s.param, [])
            valid = [(t, v) for t, v, _u, _i, q in drows if q == "ok"]
            pd.invalid += [(t, v, q) for t, v, _u, _i, q in drows if q != "ok"]
            style, gap_s = "line", max(180.0, 2.5 * cfg.store.derived_every_s)
            spans += not_ok_spans([(t, q) for t, _v, _u, _i, q in drows], s.param, gap_s)
        if not valid:
            continue
        pd.series.append(Series(s.label, [t for t, _ in valid], [v for _, v in valid],
                                style=style, ink=s.ink, width=s.width, dash=s.dash,
                                gap_s=gap_s, steps=s.source == "derived"))
    pd.quality = merge_spans(spans)
    pd.limits = limit_lines(cfg, bd.admissions, spec.limit_params, t0, t1)
    pd.refs = ref_lines(cfg, spec.limit_params)
    if spec.key == "output":
        pd.fluid = [e for e in bd.info if e.rule == "fluid_challenge" and e.transition == "result"]
    return pd


def not_ok_spans(rows: list[tuple[float, str]], param: str, gap_s: float
                 ) -> list[tuple[float, float, str, str]]:
    """The stretches of one series' rows (time, quality; in time order) that are not ok: a
    value holds until the next one of the series (at most ``gap_s``; the last one a second).

    >>> not_ok_spans([(0, "ok"), (1, "artifact"), (2, "artifact"), (3, "ok")], "SI", 30)
    [(1, 3, 'artifact', 'SI')]
    """
    out: list[tuple[float, float, str, str]] = []
    for i, (t, q) in enumerate(rows):
        if q == "ok":
            continue
        end = rows[i + 1][0] if i + 1 < len(rows) else t + 1.0
        end = min(end, t + gap_s) if end > t else t + 1.0
        if out and out[-1][2] == q and out[-1][1] >= t:
            out[-1] = (out[-1][0], max(out[-1][1], end), q, param)
        else:
            out.append((t, end, q, param))
    return out


def merge_spans(spans: list[tuple[float, float, str, str]]
                ) -> list[tuple[float, float, str, str]]:
    """Overlapping stretches (of any series of a panel) as one, with every quality and
    parameter named (comma-separated, in order of first appearance).

    >>> merge_spans([(5, 8, "artifact", "SI"), (0, 6, "calibrating", "CVP"), (9, 10, "artifact", "SI")])
    [(0, 8, 'calibrating, artifact', 'CVP, SI'), (9, 10, 'artifact', 'SI')]
    """
    out: list[tuple[float, float, list[str], list[str]]] = []
    for a, b, q, p in sorted(spans):
        if out and a <= out[-1][1]:
            last = out[-1]
            out[-1] = (last[0], max(last[1], b), last[2] + [q] * (q not in last[2]),
                       last[3] + [p] * (p not in last[3]))
        else:
            out.append((a, b, [q], [p]))
    return [(a, b, ", ".join(q), ", ".join(p)) for a, b, q, p in out]
