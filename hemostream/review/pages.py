"""Self-contained HTML review pages: one per bed, and a unit overview that links them.

Pages are put together from a bed's loaded rows (:mod:`.queries`), its panels
(:mod:`.panels`), figures (:mod:`.plots`) and the limits in force (:mod:`.limits`).

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

from html import escape
from typing import Any

from . import CAUTION, COMPARE_CAUTION
from . import plots
from ..core.display import GROUND_TRUTH_NOTES, alarm_value, fmt_value
from .limits import LimitsSource, limit_lines
from .panels import PANEL_KEYS, PANELS, panel_data
from .periods import PRIORITIES, time_in_state
from .queries import BedData, BedInfo
from .text import fluid_remarks, hhmmss, span_text, when
from ..core.rules.phrases import phrase


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
<li>Limits drawn are those of the configuration stored with the data when it was processed
(and admission overrides stored for the bed), the same the stored alarms were computed with.
A database written before configurations were stored has none: its limits are then those of
the configuration given to the report, which may differ (the page says so).</li>
</ul>
"""


def bed_page(bd: BedData, lim: LimitsSource, t0: float, t1: float, end: float, *,
             png: bool = False, db_label: str = "", back: str | None = None
             ) -> tuple[str, dict[str, plots.Figures]]:
    """A bed's page over [t0, t1] (``end``: where open alarms stop) from its loaded rows and
    the configuration its limits are drawn from."""
    bed = bd.bed
    cfg = lim.config
    shown = [p for p in bd.periods if p.start <= t1 and p.end_or(end) >= t0]
    notes_in = [n for n in bd.notes if t0 <= n["time"] <= t1]
    # a simulator's ground-truth markers are shown on the figures, not as clinical notes
    clinical_notes = [n for n in notes_in if n.get("kind") not in GROUND_TRUTH_NOTES]
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
            rows.append([escape(phrase(p.rule)), escape(p.category), pri, escape(when(p.start)),
                         escape(when(p.end)) if p.end is not None else "still active",
                         escape(span_text(p.end_or(end) - p.start)), ack,
                         escape(p.clear_reason or ""), escape(p.message),
                         escape(alarm_value({"details": p.details, "message": ""})
                                or _fmt_num(p.value, 2))])
        parts.append(_table(["alarm", "category", "priority", "raised", "cleared", "lasted",
                             "acknowledged", "ended by", "message", "value at raise"],
                            rows, {9}))
    else:
        parts.append("<p>No alarms in this period.</p>")

    # notes
    parts.append('<h2 id="notes">Notes</h2>')
    if clinical_notes:
        parts.append(_table(
            ["time", "kind", "channel", "volume", "over", "duration", "by", "text"],
            [[escape(when(n["time"])), escape(n["kind"]), escape(n.get("param") or ""),
              f"{n['volume_ml']:g} mL" if n.get("volume_ml") is not None else "",
              f"{n['over_min']:g} min" if n.get("over_min") is not None else "",
              f"{n['duration_s']:g} s" if n.get("duration_s") is not None else "",
              escape(n.get("by") or ""), escape(n.get("text") or "")] for n in clinical_notes]))
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
                         escape(str(d.get("param") or "-")),
                         escape(fmt_value(str(d.get("param")), d.get("baseline"))),
                         escape(fmt_value(str(d.get("param")), d.get("after"))),
                         (f"{d['change_pct']:+.1f} %" if d.get("change_pct") is not None
                          else "-"),
                         (f"{d['cvp_change']:+.1f}" if d.get("cvp_change") is not None
                          else "-"),
                         escape(str(d.get("outcome", "")).replace("_", " ")
                                + (" (qualified)" if fluid_remarks(e, bd.periods) else "")),
                         escape("; ".join(x for x in [d.get("reason", ""),
                                                      *fluid_remarks(e, bd.periods)] if x))])
        parts.append(_table(["bolus", "volume", "measured by", "baseline", "after", "change",
                             "CVP change (mm[Hg])", "result", "reason or remarks"], rows,
                            {3, 4, 5, 6}))
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
    if lim.stored:
        parts.append('<p class="small" id="limits-source">From the configuration stored with '
                     f"the data (sha256 <code>{lim.sha256[:12]}</code>; "
                     "<code>hemostream query configs</code> lists them), with the admission "
                     "overrides stored for the bed.</p>")
    else:
        parts.append(f'<p class="small" id="limits-source">Note: {escape(lim.note)} '
                     f"(sha256 <code>{lim.sha256[:12]}</code>).</p>")
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
        for t, v, unit, inputs, quality in rows_d[:cap]:
            inp = ", ".join(f"{escape(str(p))} at {hhmmss(float(ti))} "
                            f"({span_text(max(0.0, t - float(ti)))} before)"
                            for p, ti in inputs if isinstance(ti, int | float))
            body.append([escape(when(t)), fmt_value(param, v),
                         escape(unit), inp, escape(quality)])
        n_prov += len(body)
        more = (f" (first {cap} of {len(rows_d)}; all with "
                f"<code>hemostream query derived --param {param}</code>)"
                if len(rows_d) > cap else "")
        parts.append(f'<details id="provenance-{param}"><summary>{param}: {len(rows_d)} '
                     f"stored value(s){more}</summary>"
                     + _table(["time", "value", "unit", "inputs (measured at)", "quality"],
                              body, {1},
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
