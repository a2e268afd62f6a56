"""Figures of one bed over a time window (matplotlib, Agg): the alarm time line and one value
panel per group of parameters, all on the same time axis.

Size: the alarm time line and the value panels share the axes, shading and note drawing;
being extended now (signal-quality shading), split after that lands.

Every figure has the same width and the same left and right margins, so their time axes line
up when stacked on a page. Artists a reader may want to hover (alarm spans, notes,
fluid-challenge results) get an SVG id (``gid``) and a hover text; :func:`.svg.svg_of` turns the
figure into inline SVG with those texts as ``<title>`` elements and ids made unique per
figure (:mod:`.svg`).

Somewhat over 400 lines on purpose: the two figure builders (time line, value panel) share one
drawing style (colours, axes, alarm shading, notes), which is kept in one place here.

Colours: alarm priorities follow the IEC 60601-1-8 convention (high red, medium yellow, low
cyan); values are drawn in dark neutral tones told apart by line style, so that no value
colour can be mistaken for an alarm colour.
"""

from __future__ import annotations

import math
from datetime import timezone
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from .limits import LimitLine  # noqa: E402
from .panels import PanelData  # noqa: E402
from .periods import AlarmPeriod, InfoEvent, state_segments  # noqa: E402
from .svg import Figures, finish  # noqa: E402
from .text import (alarm_hover, fluid_remarks, fluid_text, hhmmss, note_hover,  # noqa: E402
                   span_text, when)
from ..core.rules.phrases import phrase  # noqa: E402

matplotlib.rcParams.update({
    "svg.fonttype": "none",          # text stays text: smaller, searchable, crisp
    "svg.hashsalt": "hemostream",    # deterministic ids: the same data, the same file
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
})

#: IEC 60601-1-8 convention for alarm priority colours: high red, medium yellow, low cyan
PRIORITY_COLORS = {"high": "#e3201b", "medium": "#f5c400", "low": "#19c3d6"}
TECHNICAL_HATCH = "////"
INK = ("#1b1b1b", "#5a5a5a", "#2f3f5f", "#8a8a8a")
LIMIT_COLOR = "#6b6b6b"

WIDTH_IN = 12.0
LEFT, RIGHT = 0.12, 0.82          # axes position as fractions of the width: aligned panels
DAY = 86400.0

NOTE_LABELS = {"fluid_bolus": "bolus", "line_flush": "flush", "zeroing": "zeroing",
               "reposition": "reposition", "sample_draw": "sample", "free_text": "note",
               "deterioration_onset": "onset"}


def x_of(t: float) -> float:
    """Matplotlib date number of epoch seconds (matplotlib's epoch is 1970-01-01 UTC)."""
    return t / DAY


def _breaks(t: list[float], v: list[float], gap: float) -> tuple[list[float], list[float]]:
    """Insert NaN where consecutive values are more than ``gap`` apart (no line across)."""
    xs: list[float] = []
    ys: list[float] = []
    prev = None
    for a, b in zip(t, v):
        if prev is not None and a - prev > gap:
            xs.append(x_of((a + prev) / 2))
            ys.append(math.nan)
        xs.append(x_of(a))
        ys.append(b)
        prev = a
    return xs, ys


def _envelope(t: list[float], v: list[float], bins: int):
    """Per time bin: centre, min, median, max (long windows: keeps SVG small, loses no
    extreme)."""
    import numpy as np

    ta, va = np.asarray(t), np.asarray(v)
    edges = np.linspace(ta[0], ta[-1], bins + 1)
    idx = np.clip(np.searchsorted(edges, ta, side="right") - 1, 0, bins - 1)
    out_t, lo, mid, hi = [], [], [], []
    for k in range(bins):
        sel = va[idx == k]
        if sel.size:
            out_t.append((edges[k] + edges[k + 1]) / 2)
            lo.append(float(sel.min()))
            mid.append(float(np.median(sel)))
            hi.append(float(sel.max()))
    return out_t, lo, mid, hi


def _core_range(series: list[tuple[list[float], list[float]]], t0: float, t1: float,
                bins: int = 200) -> tuple[float, float] | None:
    """The range most of the time is spent in: per series, the median of each time bin, and
    the 2nd to 98th percentile of those medians. A flush or a zeroing read through lasts
    seconds and is stored densely, so it moves few bins' medians however many values it
    has; a real change of level lasts and moves many."""
    import numpy as np

    lows, highs = [], []
    for ts, vs in series:
        if len(vs) < 20:            # too few to tell a spike from a level: all of them count
            lows.append(min(vs))
            highs.append(max(vs))
            continue
        ta, va = np.asarray(ts), np.asarray(vs)
        idx = np.clip(((ta - t0) / max(t1 - t0, 1e-9) * bins).astype(int), 0, bins - 1)
        meds = [float(np.median(va[idx == k])) for k in np.unique(idx)]
        if len(meds) < 10:
            lows.append(float(va.min()))
            highs.append(float(va.max()))
            continue
        lo, hi = np.percentile(meds, [2.0, 98.0])
        lows.append(float(lo))
        highs.append(float(hi))
    if not lows:
        return None
    return min(lows), max(highs)


def _new_fig(height_in: float) -> tuple[Figure, Any]:
    fig = Figure(figsize=(WIDTH_IN, height_in))
    bottom_in, top_in = 0.45, 0.3
    ax = fig.add_axes((LEFT, bottom_in / height_in, RIGHT - LEFT,
                       1 - (bottom_in + top_in) / height_in))
    return fig, ax


def _time_axis(ax, t0: float, t1: float) -> None:
    ax.set_xlim(x_of(t0), x_of(t1))
    loc = mdates.AutoDateLocator(tz=timezone.utc, minticks=5, maxticks=12)
    ax.xaxis.set_major_locator(loc)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(loc, tz=timezone.utc))
    ax.grid(True, axis="x", color="#dddddd", lw=0.6)
    ax.grid(True, axis="y", color="#eeeeee", lw=0.5)
    ax.set_axisbelow(True)
    ax.text(1.0, -0.02, "UTC", transform=ax.transAxes, ha="left", va="top", fontsize=7,
            color="#666666")


def _shade_alarms(ax, periods: list[AlarmPeriod], t0: float, t1: float, end: float,
                  hover: dict[str, str]) -> tuple[int, set[str]]:
    """Shade the bed's physiological alarm state: one band per stretch of time with the
    same highest active priority (so colours never mix); the hover lists the alarms."""
    phys = [p for p in periods if p.category == "physiological"]
    n = 0
    used: set[str] = set()
    for a, b, pri, who in state_segments(phys, t0, min(t1, end) if end > t0 else t1):
        n += 1
        used.add(pri)
        gid = f"alarm-span-{n}"
        ax.axvspan(x_of(a), x_of(b), color=PRIORITY_COLORS[pri], alpha=0.22, lw=0, gid=gid,
                   zorder=0.5)
        hover[gid] = (f"{pri} priority alarm state {hhmmss(a)} to {hhmmss(b)} "
                      f"({span_text(b - a)})\n" + "\n".join(
                          f"{phrase(p.rule)} ({p.peak_priority}), raised {hhmmss(p.start)}"
                          for p in who))
    return n, used


def _shade_quality(ax, spans: list[tuple[float, float, str, str]], t0: float, t1: float,
                   hover: dict[str, str]) -> int:
    """Shade (grey, hatched: no alarm colour) the stretches when a value of the panel was not
    ok (core/quality.py); the hover says which values and why. Returns how many."""
    n = 0
    for a, b, q, who in spans:
        a, b = max(a, t0), min(b, t1)
        if b <= a:
            continue
        n += 1
        gid = f"quality-span-{n}"
        ax.axvspan(x_of(a), x_of(b), facecolor="#e4e4e4", edgecolor="#9a9a9a", hatch="////",
                   lw=0, alpha=0.7, gid=gid, zorder=0.6)
        hover[gid] = (f"values not ok ({q}) {hhmmss(a)} to {hhmmss(b)} "
                      f"({span_text(b - a)}): {who}")
    return n


#: how a note is drawn: (colour, line style, line width); the default for every other kind
NOTE_STYLES = {"deterioration_onset": ("#000000", "-", 1.4)}
NOTE_DEFAULT = ("#555555", ":", 1.1)


def note_style(kind: str) -> tuple[str, str, float]:
    return NOTE_STYLES.get(kind, NOTE_DEFAULT)


def draw_notes(ax, notes: list[dict[str, Any]], t0: float, t1: float,
               hover: dict[str, str], row: float | None = None) -> int:
    """Notes in [t0, t1] as vertical lines across the axes, each with its hover text; with
    ``row`` (the time line) also a labelled marker on that row. Returns how many."""
    n = 0
    for note in notes:
        t = float(note["time"])
        if not t0 <= t <= t1:
            continue
        n += 1
        gid = f"note-{n}"
        color, ls, lw = note_style(note["kind"])
        if row is None:
            ax.axvline(x_of(t), color=color, ls=ls, lw=lw, gid=gid, zorder=2)
        else:
            ax.axvline(x_of(t), color=color, ls=ls, lw=lw * 0.7, alpha=0.6, zorder=1)
            ax.plot([x_of(t)], [row], marker="D" if note["kind"] == "deterioration_onset"
                    else "o", ms=4.5, color=color, zorder=5, gid=gid)
            ax.annotate(NOTE_LABELS.get(note["kind"], note["kind"]), (x_of(t), row),
                        xytext=(3, 2), textcoords="offset points", fontsize=6.5, color=color)
        hover[gid] = note_hover(note)
    return n


def panel_figure(pd: PanelData, periods: list[AlarmPeriod], notes: list[dict[str, Any]],
                 t0: float, t1: float, end: float, png: bool = False,
                 max_points: int = 3000) -> Figures:
    """One value panel: its series, limits as bands, alarm spans, note markers."""
    fig, ax = _new_fig(2.5)
    hover: dict[str, str] = {}
    _time_axis(ax, t0, t1)
    ax.set_title(pd.title, pad=4)
    ax.set_ylabel(pd.unit)
    handles = []
    allv: list[float] = []
    allt: list[float] = []
    series_pts: list[tuple[list[float], list[float]]] = []
    enveloped = False
    for s in pd.series:
        pts = [(a, b) for a, b in zip(s.t, s.v) if t0 <= a <= t1]
        if not pts:
            continue
        ts, vs = [a for a, _ in pts], [b for _, b in pts]
        allt += ts
        allv += vs
        series_pts.append((ts, vs))
        color = INK[s.ink % len(INK)]
        if s.style == "points":
            ax.plot([x_of(a) for a in ts], vs, ls="none", marker="o", ms=3.5, color=color,
                    zorder=3)
            handles.append(Line2D([], [], ls="none", marker="o", ms=3.5, color=color,
                                  label=s.label))
        elif len(ts) > max_points:
            enveloped = True
            ct, lo, mid, hi = _envelope(ts, vs, max_points // 2)
            ax.fill_between([x_of(a) for a in ct], lo, hi, color=color, alpha=0.18, lw=0,
                            zorder=2)
            ax.plot([x_of(a) for a in ct], mid, color=color, lw=s.width, ls=s.dash, zorder=3)
            handles.append(Line2D([], [], color=color, lw=s.width, ls=s.dash, label=s.label))
        else:
            xs, ys = _breaks(ts, vs, s.gap_s)
            ax.plot(xs, ys, color=color, lw=s.width, ls=s.dash, zorder=3,
                    drawstyle="steps-post" if s.steps else "default")
            handles.append(Line2D([], [], color=color, lw=s.width, ls=s.dash, label=s.label))
    if enveloped:
        handles.append(Patch(color=INK[0], alpha=0.18, label="range per time bin"))
    inv = [(a, b, st) for a, b, st in pd.invalid if t0 <= a <= t1]
    allt += [a for a, _, _ in inv]
    allv += [b for _, b, _ in inv]
    # y range: the values and the limits (so the distance to a limit shows); a few wild
    # values (a flush, a zeroing read through) must not flatten the rest: when the full range
    # is far wider than the range most of the time is spent in, the axis shows that range
    # (with room) and marks the values beyond it at the edge
    lim_vals = [thr for lim in pd.limits for a, b, thr in lim.steps if b >= t0 and a <= t1]
    ref_vals = [r.value for r in pd.refs]
    off_scale = 0
    if not allv:
        # nothing measured: say so, and draw no limits (there is nothing to hold them to)
        ax.text(0.5, 0.5, f"no {pd.title.lower()} values in this period",
                transform=ax.transAxes, ha="center", va="center", color="#777777")
        pd.limits, pd.refs = [], []
        y0, y1 = 0.0, 1.0
        ax.set_yticks([])
    else:
        lo_v, hi_v = min(allv), max(allv)
        core = _core_range(series_pts, t0, t1)
        if core is not None:
            q0, q1 = core
            w = max(q1 - q0, 0.1 * max(abs(q0), abs(q1)), 1e-6)
            if hi_v - lo_v > 3 * w:
                lo_v, hi_v = max(lo_v, q0 - 0.5 * w), min(hi_v, q1 + 0.5 * w)
        lo_v, hi_v = min([lo_v, *lim_vals, *ref_vals]), max([hi_v, *lim_vals, *ref_vals])
        pad = (hi_v - lo_v) * 0.08 or max(abs(hi_v) * 0.1, 1.0)
        y0, y1 = lo_v - pad, hi_v + pad
        out_t = [(a, v) for a, v in zip(allt, allv) if v > y1 or v < y0]
        off_scale = len(out_t)
        if out_t:
            for mk, sel, y in (("^", [a for a, v in out_t if v > y1], y1),
                               ("v", [a for a, v in out_t if v < y0], y0)):
                if sel:
                    ax.plot([x_of(a) for a in sel], [y] * len(sel), ls="none", marker=mk,
                            ms=4, color="#444444", clip_on=False, zorder=6)
            ext = max(abs(v) for _, v in out_t)
            handles.append(Line2D([], [], ls="none", marker="^", ms=4, color="#444444",
                                  label=f"off scale: {off_scale} value(s), to {ext:.4g}"))
    ax.set_ylim(y0, y1)
    if inv:
        ax.plot([x_of(a) for a, _, _ in inv], [b for _, b, _ in inv],
                ls="none", marker="x", ms=3, color="#9a9a9a", zorder=2.5)
        handles.append(Line2D([], [], ls="none", marker="x", ms=3, color="#9a9a9a",
                              label="value not ok (status, artifact)"))
    if _shade_quality(ax, pd.quality, t0, t1, hover):
        handles.append(Patch(facecolor="#e4e4e4", edgecolor="#9a9a9a", hatch="////", lw=0,
                             label="values not ok (artifact, status)"))
    # limits: dashed lines, labelled at the right; the band inside a parameter's limits
    # lightly shaded (one band per limited parameter; one-sided limits run to the edge)
    by_param: dict[str, dict[str, LimitLine]] = {}
    for lim in pd.limits:
        by_param.setdefault(lim.name.rsplit(" ", 1)[0], {})[lim.side] = lim
    for param, sides in by_param.items():
        cuts = sorted({t0, t1, *[a for lim in sides.values() for a, _, _ in lim.steps
                                  if t0 < a < t1]})
        for a, b in zip(cuts, cuts[1:]):
            def at(side: str) -> float | None:
                lim = sides.get(side)
                if lim is None:
                    return None
                return next((thr for s0, s1, thr in lim.steps if s0 <= a < s1), None)
            lo, hi = at("low"), at("high")
            if lo is None and hi is None:
                continue
            ax.fill_between([x_of(a), x_of(b)], [y0 if lo is None else lo] * 2,
                            [y1 if hi is None else hi] * 2, color="#8a8a8a", alpha=0.08,
                            lw=0, zorder=0.8)
    for lim in pd.limits:
        for a, b, thr in lim.steps:
            a, b = max(a, t0), min(b, t1)
            if b <= a:
                continue
            ax.plot([x_of(a), x_of(b)], [thr, thr], color=LIMIT_COLOR, lw=1.0, ls="--",
                    zorder=2)
        last = lim.steps[-1][2]
        ax.annotate(f"{lim.name} {last:g}", (1.0, last), xycoords=("axes fraction", "data"),
                    xytext=(-2, 2 if lim.side == "high" else -2), textcoords="offset points",
                    ha="right", va="bottom" if lim.side == "high" else "top", fontsize=7,
                    color="#444444", zorder=6)
    if pd.limits:
        handles.append(Line2D([], [], color=LIMIT_COLOR, lw=1.0, ls="--",
                              label="alarm limit"))
        handles.append(Patch(color="#8a8a8a", alpha=0.15, label="inside the limits"))
    for k, r in enumerate(pd.refs):
        ax.axhline(r.value, color="#9a9a9a", lw=0.8, ls="-.", zorder=1.5)
        ax.annotate(r.label, (0.01 + 0.2 * k, r.value), xycoords=("axes fraction", "data"),
                    xytext=(3, 2), textcoords="offset points", ha="left", va="bottom",
                    fontsize=7, color="#555555", zorder=6)
    spans, used = _shade_alarms(ax, periods, t0, t1, end, hover)
    n_notes = draw_notes(ax, notes, t0, t1, hover)
    for k, e in enumerate(pd.fluid, 1):
        if not t0 <= e.time <= t1:
            continue
        gid = f"fluid-result-{k}"
        remarks = fluid_remarks(e, periods)
        # the box grows away from the nearer edge of the plot: never over the legend
        ax.annotate(fluid_text(e) + (" (qualified)" if remarks else ""),
                    xy=(x_of(e.time), y1), xytext=(0, -2), textcoords="offset points",
                    ha=_label_side(e.time, t0, t1), va="top", fontsize=7.5,
                    bbox={"boxstyle": "round,pad=0.25", "fc": "white", "ec": "#777777",
                          "lw": 0.6}, zorder=5, gid=gid)
        d = e.details
        hover[gid] = "\n".join([f"fluid challenge at {when(e.time)}: {fluid_text(e)}\nbolus "
                                f"{d.get('volume_ml') or 0:g} mL at {when(d['bolus_time'])}"
                                if d.get("bolus_time") else fluid_text(e), *remarks])
    for pri in ("high", "medium", "low"):
        if pri in used:
            handles.append(Patch(color=PRIORITY_COLORS[pri], alpha=0.35,
                                 label=f"{pri} priority alarm"))
    if n_notes:
        handles.append(Line2D([], [], color=NOTE_DEFAULT[0], ls=NOTE_DEFAULT[1],
                              lw=NOTE_DEFAULT[2], label="note"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7.5,
              frameon=False, borderaxespad=0.0)
    return finish(fig, pd.key, hover, spans, n_notes, png)


def _label_side(t: float, t0: float, t1: float) -> str:
    """``ha`` for a label at ``t``: it runs rightwards in the left part of the plot and
    leftwards in the rest, so it stays inside the axes (the legend sits right of them)."""
    return "left" if t1 > t0 and (t - t0) / (t1 - t0) < 0.3 else "right"


def timeline_figure(periods: list[AlarmPeriod], info: list[InfoEvent],
                    notes: list[dict[str, Any]], t0: float, t1: float, end: float,
                    png: bool = False) -> Figures:
    """Alarm time line: one row per rule (bars by priority, technical ones hatched, ticks at
    acknowledgements), a row of notes and a row of information events."""
    shown = [p for p in periods if p.start <= t1 and p.end_or(end) >= t0]
    rules: list[str] = []
    for p in sorted(shown, key=lambda p: p.start):
        if p.rule not in rules:
            rules.append(p.rule)
    rows = ["notes", "information"] + rules
    labels = ["notes", "information"] + [phrase(r) for r in rules]
    fig, ax = _new_fig(1.0 + 0.28 * len(rows))
    hover: dict[str, str] = {}
    _time_axis(ax, t0, t1)
    ax.set_title("Alarms, notes and information", pad=4)
    ax.set_ylim(len(rows) - 0.5, -0.5)
    ax.set_yticks(range(len(rows)), labels, fontsize=7.5)
    ax.grid(False, axis="y")
    n = 0
    for p in shown:
        y = rows.index(p.rule)
        for a, b, pri in p.segments(end):
            a, b = max(a, t0), min(b, t1)
            if b < a:
                continue
            n += 1
            gid = f"alarm-span-{n}"
            ax.broken_barh([(x_of(a), x_of(max(b, a + 1.0)) - x_of(a))], (y - 0.36, 0.72),
                           facecolors=PRIORITY_COLORS[pri], edgecolors="#333333", lw=0.4,
                           hatch=TECHNICAL_HATCH if p.category == "technical" else None,
                           gid=gid, zorder=3)
            hover[gid] = alarm_hover(p, end, pri)
        for a, b in p.latched_spans(end):
            a, b = max(a, t0), min(b, t1)
            if b > a:   # condition over, alarm latched: paler, with a dotted outline
                ax.broken_barh([(x_of(a), x_of(b) - x_of(a))], (y - 0.36, 0.72),
                               facecolors="white", edgecolors="#333333", lw=0.6,
                               linestyle=":", alpha=0.6, zorder=3.5)
        for t, _by in p.acks:
            if t0 <= t <= t1:
                ax.plot([x_of(t)], [y - 0.42], marker="v", ms=4, color="#111111", zorder=5)
    n_notes = draw_notes(ax, notes, t0, t1, hover, row=0)
    k = 0
    for e in info:
        if not t0 <= e.time <= t1 or e.transition not in ("result", "profile"):
            continue
        k += 1
        gid = f"info-{k}"
        if e.rule == "fluid_challenge":
            remarks = fluid_remarks(e, periods)
            label = "\n".join([fluid_text(e), *remarks])
            short = ("fluid: " + str(e.details.get("outcome", "")).replace("_", " ")
                     + (" (qualified)" if remarks else ""))
        else:
            label = e.details.get("text") or "profile read-out: none"
            short = "profile: " + str(e.details.get("profile") or "none").replace("_", " ")
        ax.plot([x_of(e.time)], [1], marker="s", ms=4, color="#2f3f5f", zorder=5, gid=gid)
        side = _label_side(e.time, t0, t1)
        ax.annotate(short, (x_of(e.time), 1), xytext=(3 if side == "left" else -3,
                                                       3 if k % 2 else -8),
                    textcoords="offset points", fontsize=6.5, color="#2f3f5f", ha=side)
        hover[gid] = f"{e.rule} {e.transition} at {when(e.time)}\n{label}"
    handles = [Patch(facecolor=PRIORITY_COLORS[q], edgecolor="#333333", lw=0.4,
                     label=f"{q} priority") for q in ("high", "medium", "low")]
    handles += [Patch(facecolor="white", edgecolor="#333333", hatch=TECHNICAL_HATCH, lw=0.4,
                      label="technical"),
                Line2D([], [], ls="none", marker="v", ms=4, color="#111111",
                       label="acknowledged"),
                Patch(facecolor="#f2f2f2", edgecolor="#333333", lw=0.6, linestyle=":",
                      label="latched (condition over)"),
                Line2D([], [], ls="none", marker="D", ms=4.5, color="#000000",
                       label="deterioration onset")]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7.5,
              frameon=False, borderaxespad=0.0)
    if not shown:
        ax.text(0.5, 0.5, "no alarms in this period", transform=ax.transAxes, ha="center",
                va="center", color="#777777")
    return finish(fig, "alarms", hover, n, n_notes, png)
