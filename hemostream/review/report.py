"""Self-contained HTML review pages: one per bed, and a unit overview that links them.

A bed page stacks, on one time axis: the alarm time line (one row per rule, bars coloured by
priority, technical alarms hatched, acknowledgements ticked, notes and information events),
then arterial pressure (systolic, diastolic, mean; line and cuff), HR, CVP, CO/CI, SVR and
shock index, each with the configured limits as dashed lines over a dotted band beyond them,
physiological alarm periods shaded by priority, notes as vertical markers and fluid-challenge
results annotated. Below: the alarm list, notes, fluid challenges, the limits that were drawn
and where they came from, and the provenance of every derived value shown (which inputs,
measured when). Hovering a shaded span, a marker or a result shows what it is.

The page is XHTML-compatible HTML5 (it parses as XML), holds its plots as inline SVG, and
loads nothing: no scripts, no fonts, no style sheets from anywhere. It opens offline in any
browser.
"""

from __future__ import annotations

import json
import statistics
from dataclasses import dataclass, field
from datetime import datetime
from html import escape
from pathlib import Path
from typing import Any

from sqlalchemy import select

from ..core.config import Config
from ..core.processor import epoch
from ..store import TABLES
from . import CAUTION, COMPARE_CAUTION
from .data import (PRIORITIES, AlarmPeriod, BedInfo, InfoEvent, alarm_rows, build_periods,
                   commands, find_beds, load_beds, notes, time_in_state)
from . import plots
from .plots import LimitLine, PanelData, RefLine, Series, hhmmss, span_text, when


class ReportError(RuntimeError):
    """A report that cannot be written; the message says why."""


def parse_time(text: str, option: str = "time") -> float:
    try:
        t = datetime.fromisoformat(text.replace("Z", "+00:00") if text.endswith("Z") else text)
    except ValueError:
        raise ValueError(f"{option} {text!r}: expected an RFC 3339 time such as "
                         "2026-12-01T08:00:00Z") from None
    if t.tzinfo is None:
        raise ValueError(f"{option} {text!r}: give a UTC offset, e.g. 2026-12-01T08:00:00Z")
    return epoch(t)


# ----------------------------------------------------------------------------- panels


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
class BedData:
    bed: BedInfo
    obs: dict[str, list[tuple[float, float, str]]] = field(default_factory=dict)
    derived: dict[str, list[tuple[float, float, str, list]]] = field(default_factory=dict)
    periods: list[AlarmPeriod] = field(default_factory=list)
    info: list[InfoEvent] = field(default_factory=list)
    notes: list[dict[str, Any]] = field(default_factory=list)
    commands: list[dict[str, Any]] = field(default_factory=list)
    admissions: list[dict[str, Any]] = field(default_factory=list)


def load_bed(engine, bed: BedInfo, t0: float, t1: float) -> BedData:
    obs_t, der_t, adm_t = TABLES["observations"], TABLES["derived"], TABLES["admissions"]
    obs_params = sorted({s.param for p in PANELS for s in p.series if s.source == "obs"})
    der_params = sorted({s.param for p in PANELS for s in p.series if s.source == "derived"})
    bd = BedData(bed)
    margin = 120.0
    with engine.connect() as conn:
        for r in conn.execute(
                select(obs_t.c.param, obs_t.c.time, obs_t.c.value, obs_t.c.status)
                .where(obs_t.c.bed_id == bed.id, obs_t.c.param.in_(obs_params),
                       obs_t.c.time >= t0 - margin, obs_t.c.time <= t1 + margin)
                .order_by(obs_t.c.time, obs_t.c.id)):
            bd.obs.setdefault(r.param, []).append((r.time, r.value, r.status))
        for r in conn.execute(
                select(der_t.c.param, der_t.c.time, der_t.c.value, der_t.c.unit,
                       der_t.c.inputs)
                .where(der_t.c.bed_id == bed.id, der_t.c.param.in_(der_params),
                       der_t.c.time >= t0 - margin, der_t.c.time <= t1 + margin)
                .order_by(der_t.c.time, der_t.c.id)):
            try:
                inputs = json.loads(r.inputs)
            except ValueError:
                inputs = []
            bd.derived.setdefault(r.param, []).append((r.time, r.value, r.unit, inputs))
        bd.admissions = [dict(r._mapping) for r in conn.execute(
            select(adm_t).where(adm_t.c.bed_id == bed.id).order_by(adm_t.c.time, adm_t.c.id))]
    bd.periods, bd.info = build_periods(alarm_rows(engine, [bed.id]))
    bd.notes = notes(engine, [bed.id])
    bd.commands = commands(engine, [bed.id])
    return bd


def _median_gap(ts: list[float]) -> float:
    if len(ts) < 2:
        return 0.0
    return statistics.median(b - a for a, b in zip(ts, ts[1:]))


def limit_lines(cfg: Config, admissions: list[dict[str, Any]], params: tuple[str, ...],
                t0: float, t1: float) -> list[LimitLine]:
    """The limits in effect over [t0, t1]: the configuration's, with low/high replaced by the
    admission in effect (a later admission replaces the earlier; a discharge resets)."""
    if not cfg.rules.enabled:
        return []
    cuts = sorted({t0, t1, *[float(a["time"]) for a in admissions if t0 < a["time"] < t1]})
    segs = list(zip(cuts, cuts[1:])) or [(t0, t1)]

    def override_at(t: float) -> dict[str, dict[str, float]]:
        cur: dict[str, dict[str, float]] = {}
        for a in admissions:
            if a["time"] > t:
                break
            if a["discharged"]:
                cur = {}
                continue
            try:
                cur = json.loads(a["limits"] or "{}")
            except ValueError:
                cur = {}
        return cur

    out = []
    for p in params:
        rule = cfg.rules.limits.get(p)
        for side in ("low", "high"):
            steps: list[tuple[float, float, float]] = []
            overridden = False
            for a, b in segs:
                ov = override_at(a).get(p, {})
                thr = ov.get(side, getattr(rule, side) if rule is not None else None)
                if side in ov:
                    overridden = True
                if thr is None:
                    continue
                if steps and steps[-1][2] == thr and steps[-1][1] == a:
                    steps[-1] = (steps[-1][0], b, thr)
                else:
                    steps.append((a, b, float(thr)))
            if steps:
                out.append(LimitLine(f"{p} {side}", side, steps,
                                     "admission override" if overridden else "configuration"))
    return out


def ref_lines(cfg: Config, params: tuple[str, ...]) -> list[RefLine]:
    """Level thresholds of the enabled pattern rules on these parameters (e.g. SI >= 0.9)."""
    if not cfg.rules.enabled:
        return []
    out: list[RefLine] = []
    for rid, pat in cfg.rules.patterns.items():
        if not pat.enabled:
            continue
        terms = list(pat.terms) + [t for tier in pat.tiers for t in tier.terms]
        for term in terms:
            ps = [term.param] if isinstance(term.param, str) else list(term.param)
            if not ps or ps[0] not in params:
                continue
            if term.at_least is not None:
                out.append(RefLine(f"{rid} \u2265 {term.at_least:g}", term.at_least))
            if term.below is not None:
                out.append(RefLine(f"{rid} < {term.below:g}", term.below))
    seen, uniq = set(), []
    for r in out:
        if (r.label, r.value) not in seen:
            seen.add((r.label, r.value))
            uniq.append(r)
    return uniq


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


# ----------------------------------------------------------------------------- HTML

CSS = """
body { font-family: "DejaVu Sans", Arial, Helvetica, sans-serif; margin: 1.2em 2em;
       color: #1b1b1b; background: #ffffff; max-width: 1400px; }
h1 { font-size: 1.45em; margin-bottom: 0.2em; }
h2 { font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #cccccc; }
.meta { color: #555555; font-size: 0.9em; }
.caution { border: 2px solid #1b1b1b; padding: 0.5em 0.8em; margin: 0.8em 0; font-size: 0.92em;
           background: #f6f6f6; }
figure.panel { margin: 0; padding: 0; }
figure.panel figcaption { display: none; }
svg.plot { display: block; width: 100%; height: auto; }
svg.plot g.alarm-span:hover, svg.plot g.note:hover, svg.plot g.fluid-result:hover,
svg.plot g.info:hover { opacity: 0.6; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.4em 0; }
th, td { border: 1px solid #cccccc; padding: 0.15em 0.45em; text-align: left;
         vertical-align: top; }
th { background: #eeeeee; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.pri { display: inline-block; min-width: 4.2em; padding: 0 0.3em; border: 1px solid #555555; }
.pri-high { background: #e3201b; color: #ffffff; }
.pri-medium { background: #f5c400; color: #1b1b1b; }
.pri-low { background: #19c3d6; color: #1b1b1b; }
.pri-none { background: #ffffff; }
details { margin: 0.3em 0; }
summary { cursor: pointer; }
.small { font-size: 0.85em; color: #555555; }
"""


def _pri(p: str) -> str:
    return f'<span class="pri pri-{escape(p)}">{escape(p)}</span>'


def _table(head: list[str], rows: list[list[str]], num: set[int] | None = None,
           cls: str = "") -> str:
    num = num or set()
    h = "".join(f"<th>{escape(x)}</th>" for x in head)
    body = "".join(
        "<tr>" + "".join(f'<td class="num">{c}</td>' if i in num else f"<td>{c}</td>"
                         for i, c in enumerate(r)) + "</tr>" for r in rows)
    c = f' class="{cls}"' if cls else ""
    return f"<table{c}><thead><tr>{h}</tr></thead><tbody>{body}</tbody></table>"


def _page(title: str, body: str) -> str:
    return ("<!DOCTYPE html>\n"
            '<html xmlns="http://www.w3.org/1999/xhtml" lang="en">\n<head>\n'
            '<meta charset="utf-8"/>\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1"/>\n'
            f"<title>{escape(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n"
            f"{body}\n</body>\n</html>\n")


def _caution_box() -> str:
    return (f'<div class="caution" id="caution"><strong>Caution.</strong> {escape(CAUTION)} '
            "This page is a review of stored data after the event, not a live display. "
            f"{escape(COMPARE_CAUTION.replace('These figures', 'Alarm figures here'))}</div>")


def _fmt_num(v: Any, nd: int = 1) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{nd}f}"
    return escape(str(v))


HOW_TO_READ = """
<h2 id="how-to-read">How to read this page</h2>
<ul class="small">
<li>All panels share one time axis (UTC). The top panel lists each alarm rule on its own row:
bars are coloured by priority (IEC 60601-1-8 convention: high red, medium yellow, low cyan),
technical alarms are hatched, a small triangle marks an acknowledgement, and the pale part
of a bar is a latched alarm whose condition had already ended (it stays until acknowledged).
The rows above show notes and information (fluid-challenge results, profile read-outs).</li>
<li>Value panels: lines are valid values (a gap in the line is a gap in the data); dots are
intermittent measurements (cuff, thermodilution); grey crosses are values with a status other
than valid (zeroing, flush, questionable), which feed no derivation and no alarm. Dashed
horizontal lines are alarm limits and the light grey band lies inside them; dash-dotted lines
are thresholds of pattern rules. When a few values lie far outside the range the rest of the
period is spent in (a flush or zeroing read through), the axis keeps to that range and marks
the others with a triangle at the edge. Coloured vertical bands show the bed's physiological
alarm state, by its highest active priority. Vertical dotted lines are notes (solid black: a
marked deterioration onset).</li>
<li>Hover over a band, a marker or a result to see what it is. Derived values (MAP when not
measured, CO/CI, SVR, SI) are computed by hemostream from the inputs listed in the provenance
tables; they are only as good as those inputs (transducer level, zeroing, cuff size,
thermodilution technique). They are stored when they first appear, when they move by more
than the store's deadband (5 % by default) and at least once a minute, so they are drawn as
steps. A value derived while a line was flushed or zeroed is stored like any other: read it
next to the notes.</li>
<li>Limits drawn are those of the configuration given to the report (and admission overrides
stored for the bed); the alarms are those stored when the data were processed, which may have
used another configuration.</li>
</ul>
"""


def bed_page(engine, cfg: Config, bed: BedInfo, t_from: float | None, t_to: float | None,
             *, png: bool = False, db_label: str = "", back: str | None = None
             ) -> tuple[str, dict[str, plots.Figures]]:
    if bed.start is None or bed.end is None:
        raise ReportError(f"bed {bed.key} has no observations in the database")
    t0 = bed.start if t_from is None else t_from
    t1 = bed.end if t_to is None else t_to
    if t1 <= t0:
        t1 = t0 + 60.0
    bd = load_bed(engine, bed, t0, t1)
    end = max(bed.end, t1) if t_to is None else t1
    shown = [p for p in bd.periods if p.start <= t1 and p.end_or(end) >= t0]
    notes_in = [n for n in bd.notes if t0 <= n["time"] <= t1]
    figs: dict[str, plots.Figures] = {}
    figs["alarms"] = plots.timeline_figure(shown, bd.info, notes_in, t0, t1, end, png=png)
    for spec in PANELS:
        figs[spec.key] = plots.panel_figure(panel_data(spec, bd, cfg, t0, t1), shown,
                                            notes_in, t0, t1, end, png=png)

    parts = []
    if back:
        parts.append(f'<p class="small"><a href="{escape(back)}">unit overview</a></p>')
    parts.append(f"<h1>Bed {escape(bed.key)}: review of stored values and alarms</h1>")
    parts.append(f'<p class="meta">{escape(when(t0))} to {escape(when(t1))} '
                 f"({escape(span_text(t1 - t0))}); from {escape(db_label or 'the database')}; "
                 "times UTC.</p>")
    parts.append(_caution_box())

    # summary
    phys = [p for p in shown if p.category == "physiological"]
    tech = [p for p in shown if p.category == "technical"]
    st = time_in_state(shown, max(t0, bed.start), min(t1, max(bed.end, t0)))
    tot = sum(st.values()) or 1.0
    rows = [[_pri(q), str(sum(1 for p in phys if p.peak_priority == q)),
             str(sum(1 for p in tech if p.peak_priority == q)), f"{100 * st[q] / tot:.1f} %"]
            for q in PRIORITIES]
    rows.append([_pri("none"), "", "", f"{100 * st['none'] / tot:.1f} %"])
    parts.append('<h2 id="summary">Summary</h2>')
    parts.append(_table(["priority (highest reached)", "physiological alarms",
                         "technical alarms", "share of time in this state"], rows, {1, 2, 3}))
    hrs = sum(min(p.end_or(end), t1) - max(p.start, t0) for p in shown) / 3600
    parts.append(f'<p class="small">{len(shown)} alarm(s), {hrs:.2f} alarm-hours in the '
                 f"period; {len(notes_in)} note(s).</p>")

    # plots
    parts.append('<h2 id="plots">Time line</h2>')
    titles = {"alarms": "Alarms, notes and information", **{p.key: p.title for p in PANELS}}
    for key in PANEL_KEYS:
        f = figs[key]
        parts.append(f'<figure class="panel" id="panel-{key}" data-alarm-spans="{f.alarm_spans}"'
                     f' data-notes="{f.notes}"><figcaption>{escape(titles[key])}</figcaption>'
                     f"{f.svg}</figure>")

    # alarm list
    parts.append('<h2 id="alarm-list">Alarms</h2>')
    if shown:
        rows = []
        for p in sorted(shown, key=lambda p: (p.start, p.rule)):
            ack = "; ".join(f"{hhmmss(t)}" + (f" by {escape(by)}" if by else "")
                            + f" (after {span_text(t - p.start)})" for t, by in p.acks) or "-"
            pri = _pri(p.raised_priority) + (
                f" to {_pri(p.peak_priority)}" if p.peak_priority != p.raised_priority else "")
            rows.append([escape(p.rule), escape(p.category), pri, escape(when(p.start)),
                         escape(when(p.end)) if p.end is not None else "still active",
                         escape(span_text(p.end_or(end) - p.start)), ack,
                         escape(p.clear_reason or ""), escape(p.message),
                         _fmt_num(p.value, 2)])
        parts.append(_table(["rule", "category", "priority", "raised", "cleared", "lasted",
                             "acknowledged", "ended by", "message", "value at raise"],
                            rows, {9}))
    else:
        parts.append("<p>No alarms in this period.</p>")

    # notes
    parts.append('<h2 id="notes">Notes</h2>')
    if notes_in:
        parts.append(_table(
            ["time", "kind", "channel", "volume", "over", "duration", "by", "text"],
            [[escape(when(n["time"])), escape(n["kind"]), escape(n.get("param") or ""),
              f"{n['volume_ml']:g} mL" if n.get("volume_ml") is not None else "",
              f"{n['over_min']:g} min" if n.get("over_min") is not None else "",
              f"{n['duration_s']:g} s" if n.get("duration_s") is not None else "",
              escape(n.get("by") or ""), escape(n.get("text") or "")] for n in notes_in]))
    else:
        parts.append("<p>No notes in this period.</p>")

    # fluid challenges
    fc = [e for e in bd.info if e.rule == "fluid_challenge" and e.transition == "result"
          and t0 <= e.time <= t1]
    parts.append('<h2 id="fluid">Fluid challenges</h2>')
    if fc:
        rows = []
        for e in fc:
            d = e.details
            rows.append([escape(when(d["bolus_time"])) if d.get("bolus_time") else "-",
                         f"{d['volume_ml']:g} mL" if d.get("volume_ml") else "-",
                         escape(str(d.get("param") or "-")), _fmt_num(d.get("baseline"), 2),
                         _fmt_num(d.get("after"), 2),
                         (f"{d['change_pct']:+.1f} %" if d.get("change_pct") is not None
                          else "-"),
                         (f"{d['cvp_change']:+.1f}" if d.get("cvp_change") is not None
                          else "-"),
                         escape(str(d.get("outcome", "")).replace("_", " ")),
                         escape(d.get("reason", ""))])
        parts.append(_table(["bolus", "volume", "measured by", "baseline", "after", "change",
                             "CVP change (mm[Hg])", "result", "reason"], rows, {3, 4, 5, 6}))
        parts.append('<p class="small">Responsive when the value rose by at least the '
                     "configured threshold (10 % by default): a rise in SV or CO of 10-15 % "
                     "after 250-500 mL marks a preload-responsive patient (Monnet, Marik, "
                     "Teboul 2016, from memory). Information for the clinician, not a "
                     "diagnosis.</p>")
    else:
        parts.append("<p>No fluid-challenge results in this period.</p>")

    # commands
    cmds = [c for c in bd.commands if t0 <= c["time"] <= t1]
    if cmds:
        parts.append('<h2 id="commands">Commands</h2>')
        parts.append(_table(["time", "action", "alarm", "by", "result"],
                            [[escape(when(c["time"])), escape(c["action"]), escape(c["alarm"]),
                              escape(c["by"]), escape(c["result"])] for c in cmds]))

    # limits drawn
    parts.append('<h2 id="limits">Limits drawn</h2>')
    lim_rows = []
    for spec in PANELS:
        for lim in limit_lines(cfg, bd.admissions, spec.limit_params, t0, t1):
            lim_rows.append([escape(spec.title), escape(lim.name),
                             "; ".join(f"{s[2]:g} from {hhmmss(s[0])}" for s in lim.steps),
                             escape(lim.source)])
    parts.append(_table(["panel", "limit", "value", "from"], lim_rows) if lim_rows else
                 "<p>No limits configured for these panels.</p>")

    # provenance
    parts.append('<h2 id="provenance">Provenance of derived values</h2>')
    parts.append('<p class="small">Each derived value as stored (when it first appears, when '
                 "it moves by more than the store deadband, and at least once a minute), with "
                 "the inputs it was computed from and how old each input was.</p>")
    n_prov = 0
    for param in ("MAP", "CO", "CI", "SVR", "SI"):
        rows_d = [r for r in bd.derived.get(param, []) if t0 <= r[0] <= t1]
        if not rows_d:
            continue
        cap = 400
        body = []
        for t, v, unit, inputs in rows_d[:cap]:
            inp = ", ".join(f"{escape(str(p))} at {hhmmss(float(ti))} "
                            f"({span_text(max(0.0, t - float(ti)))} before)"
                            for p, ti in inputs if isinstance(ti, int | float))
            body.append([escape(when(t)), f"{v:.3g}" if abs(v) < 100 else f"{v:.0f}",
                         escape(unit), inp])
        n_prov += len(body)
        more = (f" (first {cap} of {len(rows_d)}; all with "
                f"<code>hemostream query derived --param {param}</code>)"
                if len(rows_d) > cap else "")
        parts.append(f'<details id="provenance-{param}"><summary>{param}: {len(rows_d)} '
                     f"stored value(s){more}</summary>"
                     + _table(["time", "value", "unit", "inputs (measured at)"], body, {1},
                              cls="provenance") + "</details>")
    if not n_prov:
        parts.append("<p>No derived values in this period.</p>")
    parts.append(HOW_TO_READ)
    parts.append(f'<p class="small">Written by hemostream report. {escape(CAUTION)}</p>')
    return _page(f"hemostream review: {bed.key}", "\n".join(parts)), figs


def unit_page(beds: list[BedInfo], counts: dict[int, dict[str, Any]], links: dict[int, str],
              unit: str, db_label: str, t_from: float | None, t_to: float | None) -> str:
    parts = [f"<h1>Unit {escape(unit)}: beds, alarms and notes</h1>",
             f'<p class="meta">from {escape(db_label or "the database")}'
             + (f"; {escape(when(t_from))}" if t_from else "")
             + (f" to {escape(when(t_to))}" if t_to else "") + "; times UTC.</p>",
             _caution_box()]
    rows = []
    for b in beds:
        c = counts[b.id]
        link = links.get(b.id)
        rows.append([f'<a href="{escape(link)}">{escape(b.bed)}</a>' if link else
                     f"{escape(b.bed)} (no observations)",
                     escape(when(c["t0"])) if c.get("t0") else "-",
                     escape(span_text(c["span"])) if c.get("span") else "-",
                     str(c["high"]), str(c["medium"]), str(c["low"]), str(c["technical"]),
                     f"{c['hours']:.2f}", str(c["notes"]), str(c["onsets"]),
                     str(c["fluid"])])
    parts.append('<h2 id="beds">Beds</h2>')
    parts.append(_table(["bed", "from", "length", "high", "medium", "low", "technical",
                         "alarm-hours", "notes", "deterioration onsets",
                         "fluid challenges"], rows, {3, 4, 5, 6, 7, 8, 9, 10}))
    parts.append('<p class="small">Physiological alarms are counted by the highest priority '
                 "they reached; technical alarms (silent feeds or devices, values not valid, "
                 "suspected artifacts) separately. Each bed's page shows the time line.</p>")
    parts.append(f'<p class="small">Written by hemostream report. {escape(CAUTION)}</p>')
    return _page(f"hemostream review: unit {unit}", "\n".join(parts))


def _bed_counts(engine, bed: BedInfo, t0: float | None, t1: float | None) -> dict[str, Any]:
    periods, info = build_periods(alarm_rows(engine, [bed.id]))
    a = bed.start if t0 is None else t0
    b = bed.end if t1 is None else t1
    c: dict[str, Any] = {"high": 0, "medium": 0, "low": 0, "technical": 0, "hours": 0.0,
                         "t0": a, "span": (b - a) if a is not None and b is not None else 0}
    if a is None or b is None:
        c.update(notes=0, onsets=0, fluid=0)
        return c
    end = bed.end or b
    for p in periods:
        if p.start > b or p.end_or(end) < a:
            continue
        if p.category == "technical":
            c["technical"] += 1
        else:
            c[p.peak_priority] += 1
        c["hours"] += (min(p.end_or(end), b) - max(p.start, a)) / 3600
    ns = [n for n in notes(engine, [bed.id]) if a <= n["time"] <= b]
    c["notes"] = len(ns)
    c["onsets"] = sum(1 for n in ns if n["kind"] == "deterioration_onset")
    c["fluid"] = sum(1 for e in info if e.rule == "fluid_challenge"
                     and e.transition == "result" and a <= e.time <= b)
    return c


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)


def write_report(engine, cfg: Config, *, out: str | Path, bed: str | None = None,
                 unit: str | None = None, t_from: float | None = None,
                 t_to: float | None = None, png: bool = False,
                 db_label: str = "") -> list[str]:
    """Write the page(s); return the paths written (HTML first, then PNGs)."""
    out = Path(out)
    beds = load_beds(engine)
    written: list[str] = []

    def write_bed(b: BedInfo, path: Path, back: str | None) -> None:
        html, figs = bed_page(engine, cfg, b, t_from, t_to, png=png, db_label=db_label,
                              back=back)
        path.write_text(html, encoding="utf-8")
        written.append(str(path))
        if png:
            for key, f in figs.items():
                p = path.with_name(f"{path.stem}-{key}.png")
                p.write_bytes(f.png or b"")
                written.append(str(p))

    out.parent.mkdir(parents=True, exist_ok=True)
    if bed is not None:
        found = find_beds(beds, bed)
        if not found:
            have = ", ".join(b.key for b in beds.values()) or "none"
            raise ReportError(f"no bed {bed!r} in the database (beds: {have})")
        if len(found) > 1:
            raise ReportError(f"bed {bed!r} is in several units; give UNIT/BED "
                              f"({', '.join(b.key for b in found)})")
        write_bed(found[0], out, None)
        return written
    unit_beds = [b for b in beds.values() if b.unit == unit]
    if not unit_beds:
        units = sorted({b.unit for b in beds.values()})
        raise ReportError(f"no unit {unit!r} in the database (units: "
                          f"{', '.join(units) or 'none'})")
    links = {b.id: f"{out.stem}-{_safe(b.bed)}.html" for b in unit_beds
             if b.start is not None}
    counts = {b.id: _bed_counts(engine, b, t_from, t_to) for b in unit_beds}
    out.write_text(unit_page(unit_beds, counts, links, unit, db_label, t_from, t_to),
                   encoding="utf-8")
    written.append(str(out))
    for b in unit_beds:
        if b.start is None:
            continue
        write_bed(b, out.with_name(links[b.id]), out.name)
    return written
