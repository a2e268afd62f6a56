"""Drawing the unit view with rich: bed tiles, the unit alarm list, one bed's detail.

Size: the header, tiles, alarm list and bed detail share the layout helpers; to be split by
screen part (issue 16).

Colours follow the IEC 60601-1-8 convention for alarm priority (high red, medium yellow,
low cyan). A new (unacknowledged) alarm is drawn bold and blinking; an acknowledged one
steady and dim, an audio-paused one with a "paused" mark; technical conditions are labelled
"technical" and drawn in italics so they read differently from physiological ones. Values
older than their expected interval are drawn dim and struck through with their age, never
as current; a value whose quality is not ``ok`` (an artifact: a closed line during a sample
draw, a flush, a zeroing; a device status such as ``calibrating``) is drawn dim and in
italics with its quality and reason, never as a plain current number.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone

from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from ..core.display import alarm_value, fmt_value, unit_of
from ..core.rules.phrases import phrase
from .model import BedState, UnitView

CAUTION = ("Secondary display and notification aid, not a medical device: confirm every "
           "value and alarm at the bedside monitor.")
CAUTION_SHORT = "Secondary aid, not a medical device. Confirm at the bedside monitor."
KEYS = "arrows move · enter details · a acknowledge · p pause audio · esc back · q quit"

PRIORITY_STYLE = {"high": "red", "medium": "yellow", "low": "cyan", "info": "white"}
ARROW = {"rising": "↑", "falling": "↓", "steady": "→"}
SPARK = "▁▂▃▄▅▆▇█"
TILE_HEIGHT = 8
#: a feed whose newest message is older than this is shown as lagging (project choice: the
#: shortest maximum age of a continuous value)
LAG_WARN_S = 10.0
TILE_MIN_WIDTH = 38

# one number format and unit per parameter, shared with the demo summary and the report
FMT_VALUE, UNIT_OF = fmt_value, unit_of


@dataclass
class Screen:
    """Everything around the view that the header shows."""

    unit: str
    source: str
    connected: bool = True
    rate: float = 0.0            # messages per second
    lag_s: float | None = None
    operator: str | None = None
    message: str = ""            # last key result, e.g. "acknowledged ..."
    #: configured unit names by id; with ``unit`` empty the header names the units seen
    unit_names: dict = field(default_factory=dict)


def unit_label(scr: Screen, view: UnitView) -> str:
    """The unit(s) as the header names them: id and configured name."""
    ids = [scr.unit] if scr.unit else sorted({k.split("/", 1)[0] for k in view.beds})
    if not ids:
        return "(no unit seen yet)"
    return ", ".join(f"{u} ({scr.unit_names[u]})" if scr.unit_names.get(u) else u
                     for u in ids)


def fmt_age(seconds: float) -> str:
    """Short age: 12s, 4m, 2h.

    >>> fmt_age(12.3), fmt_age(250), fmt_age(7300)
    ('12s', '4m', '2h')
    """
    if seconds < 60:
        return f"{seconds:.0f}s"
    if seconds < 3600:
        return f"{seconds // 60:.0f}m"
    return f"{seconds // 3600:.0f}h"


def sparkline(values, width: int, min_span: float = 0.0) -> str:
    """Unicode block sparkline of the last ``width`` values; gaps (None) as spaces.

    The vertical scale covers at least ``min_span`` around the values, so measurement noise
    does not look like a swing.

    >>> sparkline([1, 2, 3, None, 3], 5)
    '▁▄█ █'
    >>> sparkline([90, 91, 90], 3, min_span=20)
    '▄▅▄'
    """
    vals = list(values)[-width:]
    nums = [v for v in vals if v is not None]
    if not nums:
        return " " * len(vals)
    lo, hi = min(nums), max(nums)
    if hi - lo < min_span:
        mid = (hi + lo) / 2
        lo, hi = mid - min_span / 2, mid + min_span / 2
    span = hi - lo or 1.0
    return "".join(" " if v is None else SPARK[min(7, int((v - lo) / span * 7.999))]
                   for v in vals)


def value_text(b: BedState, param: str, now: float, show_age_after: float = 10.0,
               fmt: str | None = None, reason: bool = True) -> Text:
    """A value with its trend arrow; dim and struck through with its age when stale; dim,
    in italics and with its quality (and, with ``reason``, why) when it is not ok."""
    r, stale = b.reading(param, now)
    if r is None:
        return Text("--", style="dim")
    s = fmt.format(r.value) if fmt else fmt_value(param, r.value)
    mark = b.mark(param)
    if mark is not None:
        return _marked(s, mark if reason else (mark[0], ""))
    t = Text(s, style="dim strike" if stale else "bold")
    if b.status.get(param) and b.status[param] != "valid":
        t.append(f" {b.status[param]}", style="magenta")
    arrow = ARROW.get(b.trends.get(param, ""), "")
    if arrow and not stale:
        t.append(arrow)
    if stale:
        t.append(f" stale {fmt_age(r.age(now))}", style="dim")
    elif r.age(now) >= show_age_after:
        t.append(f" {fmt_age(r.age(now))}", style="dim")
    return t


def _marked(s: str, mark: tuple[str, str]) -> Text:
    """A value that is not ok: dim, in italics, with its quality and reason."""
    q, why = mark
    return Text.assemble((s, "dim italic"), (f" {q}" + (f": {why}" if why else ""),
                                             "magenta dim"))


def pressure_text(b: BedState, now: float, reason: bool = True) -> Text:
    """Arterial pressure as sys/dia (mean) with its source: line preferred over cuff."""
    for src, (s, d, m), label in (("line", ("ABP_SYS", "ABP_DIA", "ABP_MEAN"), "ABP"),
                                  ("cuff", ("NIBP_SYS", "NIBP_DIA", "NIBP_MEAN"), "NIBP")):
        rs, stale = b.reading(s, now)
        if rs is None:
            continue
        rd, _ = b.reading(d, now)
        rm, _ = b.reading(m, now)
        mean = rm.value if rm is not None else (b.values["MAP"].value if "MAP" in b.values
                                                else None)
        txt = f"{rs.value:.0f}/{rd.value:.0f}" if rd is not None else f"{rs.value:.0f}/--"
        if mean is not None:
            txt += f" ({mean:.0f})"
        mark = b.mark(s) or b.mark(d) or b.mark(m)
        if mark is not None:
            return Text.assemble((f"{label} ", "dim"),
                                 _marked(txt, mark if reason else (mark[0], "")))
        t = Text.assemble((f"{label} ", "dim"), (txt, "dim strike" if stale else "bold"))
        arrow = ARROW.get(b.trends.get("MAP", ""), "")
        if arrow and not stale:
            t.append(arrow)
        t.append(f" {src}", style="dim")
        age = rs.age(now)
        if stale:
            t.append(f" stale {fmt_age(age)}", style="dim")
        elif age >= 10:
            t.append(f" {fmt_age(age)}", style="dim")
        return t
    return Text("ABP --", style="dim")


def _pair(label: str, value: Text) -> Text:
    return Text.assemble((f"{label} ", "dim"), value)


def alarm_label(a: dict) -> Text:
    """One alarm as text, styled by priority and state."""
    pr = a.get("priority", "low")
    color = PRIORITY_STYLE.get(pr, "white")
    acked = a.get("acknowledged")
    paused = a.get("audio_paused_until")
    style = f"{color} dim" if acked else f"bold {color} blink"
    if a.get("category") == "technical":
        style += " italic"
    t = Text(f"{pr.upper()} ", style=style)
    # the phrase a nurse reads at a glance; the rule id stays in the data (older publishers
    # send no phrase: it is looked up from the rule id)
    name = a.get("phrase") or phrase(str(a.get("rule", "?")))
    if a.get("category") == "technical":
        name = f"technical: {name}"
    t.append(name, style=style)
    if acked:
        t.append(" (acknowledged)", style="dim")
    elif paused:
        t.append(" (audio paused)", style=color)
    if a.get("latched"):
        t.append(" latched", style="dim")
    return t


TILE_PARAMS = ("HR", "SPO2", "SI", "ABP_SYS", "ABP_DIA", "ABP_MEAN", "NIBP_SYS", "NIBP_DIA",
               "NIBP_MEAN", "CVP", "CO", "CI", "SVR")


def tile(b: BedState, now: float, width: int, selected: bool) -> Panel:
    def v(p: str) -> Text:     # a tile is narrow: the reasons go to its title
        return value_text(b, p, now, reason=False)
    lines = [
        Text.assemble(_pair("HR", v("HR")), "  ", _pair("SpO2", v("SPO2")), "  ",
                      _pair("SI", v("SI"))),
        pressure_text(b, now, reason=False),
        Text.assemble(_pair("CVP", v("CVP")), "  ", _pair("CO", v("CO")), "  ",
                      _pair("CI", v("CI"))),
        Text.assemble(_pair("SVR", v("SVR")), "  ", readout_short(b)),
    ]
    strip_w = max(10, width - 10)
    # scale floors: 20 mm[Hg] of MAP and 1 L/min of CO fill the strip (project choice)
    lines.append(Text.assemble(("MAP ", "dim"), (sparkline(b.strip_map, strip_w, 20.0),
                                                 "green")))
    lines.append(Text.assemble(("CO  ", "dim"), (sparkline(b.strip_co, strip_w, 1.0),
                                                 "green")))
    top = b.top_alarm()
    border = "white"
    subtitle = None
    if top is not None:
        border = PRIORITY_STYLE.get(top.get("priority"), "white")
        if top.get("acknowledged"):
            border += " dim"
        subtitle = alarm_label(top)
        if len(b.alarms) > 1:
            subtitle.append(f" +{len(b.alarms) - 1}", style="dim")
    title = Text(b.bed, style="reverse bold" if selected else "bold")
    reasons = dict.fromkeys(m[1] or m[0] for m in map(b.mark, TILE_PARAMS) if m is not None)
    if reasons:
        title.append(" " + ", ".join(reasons), style="magenta")
    for line in lines:
        line.truncate(width - 4, overflow="ellipsis")
        line.no_wrap = True
    return Panel(Group(*lines), title=title, title_align="left", subtitle=subtitle,
                 subtitle_align="right", border_style=border, height=TILE_HEIGHT, width=width,
                 padding=(0, 1))


def _outcome(d: dict) -> str:
    out = d.get("outcome")
    if out:
        return str(out).replace("_", " ")
    resp = d.get("responsive")
    return "responsive" if resp else "not responsive" if resp is not None else "result"


def readout_short(b: BedState) -> Text:
    fc = b.fluid_challenge
    if fc is not None:
        d = fc.get("details") or {}
        resp = d.get("responsive")
        ch = d.get("change_pct")
        t = Text.assemble(("bolus: ", "dim"))
        word = _outcome(d)
        t.append(word + (f" {ch:+.0f}%" if isinstance(ch, int | float) else ""),
                 style="green" if resp else "yellow")
        return t
    if b.profile:
        return Text(b.profile, style="dim")
    return Text("")


def header(scr: Screen, view: UnitView, now: float) -> Text:
    clock = datetime.fromtimestamp(now, timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC") \
        if now > 0 else "--"
    conn = Text("connected", style="green") if scr.connected else \
        Text("DISCONNECTED", style="bold red reverse")
    if scr.connected and scr.lag_s is not None and scr.lag_s > LAG_WARN_S:
        # connected but nothing new: a warning, where a narrow screen does not cut it
        conn = Text(f"FEED LAGGING {fmt_age(scr.lag_s)}", style="bold yellow reverse")
    t = Text.assemble(("hemostream ", "bold"), (f"unit {unit_label(scr, view)}", "bold cyan"), "  ", clock,
                      "  ", conn)
    db = view.service.get("database") if isinstance(view.service, dict) else None
    if isinstance(db, dict) and db.get("state") == "waiting":
        # a technical condition of the service itself: nothing new is being stored
        t.append(f"  DATABASE WAITING {fmt_age(float(db.get('waiting_s') or 0))}: data not "
                 "stored yet", style="bold cyan reverse italic")
    t.append(f"  {len(view.beds)} beds  {scr.rate:.0f} msg/s")
    if scr.lag_s is not None and scr.lag_s <= LAG_WARN_S:
        t.append(f"  lag {scr.lag_s:.1f}s")
    if scr.operator:
        t.append(f"  operator {scr.operator}", style="dim")
    t.append(f"  {scr.source}", style="dim")     # last: it is what gets cut on a narrow screen
    t.no_wrap = True
    t.overflow = "ellipsis"
    return t


def footer(scr: Screen, width: int) -> Group:
    c = Text(CAUTION if width >= len(CAUTION) else CAUTION_SHORT, style="bold yellow")
    k = Text(KEYS, style="dim")
    if scr.message:
        k = Text(scr.message, style="bold")
    c.truncate(width, overflow="ellipsis")
    k.truncate(width, overflow="ellipsis")
    return Group(c, k)


def _current_of(b: BedState, now: float):
    """The bed's current (not stale) value of a parameter, or None."""
    def current(param: str) -> float | None:
        r, stale = b.reading(param, now)
        return r.value if r is not None and not stale and r.quality == "ok" else None
    return current


def alarm_table(view: UnitView, now: float, rows: int, width: int) -> Table:
    t = Table(box=None, pad_edge=False, show_edge=False, header_style="bold")
    t.add_column("bed", no_wrap=True, overflow="ellipsis", min_width=8)
    t.add_column("alarm", no_wrap=True, overflow="ellipsis", min_width=24,
                 max_width=max(24, width - 30))
    t.add_column("since", no_wrap=True, min_width=8)
    t.add_column("now", no_wrap=True, min_width=6, overflow="ellipsis")
    items = view.alarm_list()
    if len(items) > rows:
        shown, more = items[:max(0, rows - 1)], len(items) - max(0, rows - 1)
    else:
        shown, more = items, 0
    for b, a in shown:
        since = a.get("since")
        t.add_row(b.bed, alarm_label(a),
                  fmt_age(now - since) + " ago" if isinstance(since, int | float) else "",
                  alarm_value(a, _current_of(b, now)))
    if not items:
        t.add_row("", Text("no active alarms", style="dim"), "", "")
    elif more:
        t.add_row("", Text(f"... and {more} more", style="dim"), "", "")
    return t


def unit_screen(view: UnitView, scr: Screen, now: float, width: int, height: int,
                selected: int = 0) -> RenderableType:
    """The whole unit: header, as many bed tiles as fit, the alarm list, the footer.

    Tiles come first: the alarm list takes what is left, but at least its heading, its
    column names and one row (at 80x24 that leaves room for four tiles).
    """
    beds = view.sorted_beds()
    cols = max(1, width // TILE_MIN_WIDTH)
    tile_w = width // cols
    needed_rows = max(1, -(-len(beds) // cols))
    tile_rows = max(1, min(needed_rows, (height - 3 - 3) // TILE_HEIGHT))
    per_page = cols * tile_rows
    page = (selected // per_page) if per_page else 0
    shown = beds[page * per_page:(page + 1) * per_page]
    grid = Table.grid(padding=0)
    for _ in range(cols):
        grid.add_column(width=tile_w)
    for r in range(0, len(shown), cols):
        grid.add_row(*[tile(b, now, tile_w, page * per_page + r + i == selected)
                       for i, b in enumerate(shown[r:r + cols])])
    used_rows = max(1, -(-len(shown) // cols))
    alarm_rows = max(1, height - 3 - used_rows * TILE_HEIGHT - 2)
    n_alarms = len(view.alarm_list())
    heading = Text(f"alarms ({n_alarms})", style="bold")
    if len(beds) > per_page:
        heading.append(f"   beds {page * per_page + 1}-{page * per_page + len(shown)} of "
                       f"{len(beds)} (page {page + 1}/{(len(beds) - 1) // per_page + 1})",
                       style="dim")
    parts: list[RenderableType] = [header(scr, view, now)]
    parts.append(grid if beds else Text("waiting for data ...", style="dim"))
    parts.append(heading)
    parts.append(alarm_table(view, now, alarm_rows, width))
    parts.append(footer(scr, width))
    return Group(*parts)


DETAIL_PARAMS = ("HR", "PR", "ABP_SYS", "ABP_DIA", "ABP_MEAN", "NIBP_SYS", "NIBP_DIA",
                 "NIBP_MEAN", "MAP", "PP", "CVP", "PAP_SYS", "PAP_DIA", "PAP_MEAN", "PAWP",
                 "CO", "CI", "SV", "SVI", "SVR", "SVRI", "PVR", "LVSWI", "RVSWI", "SI", "MSI",
                 "SPO2", "RR", "TEMP", "BSA")


def bed_screen(view: UnitView, scr: Screen, b: BedState, now: float, width: int, height: int,
               alarm_index: int = 0) -> RenderableType:
    """One bed: every parameter with age and trend, its alarms, history and notes."""
    params = Table(box=None, header_style="bold", pad_edge=False)
    for col in ("param", "value", "unit", "age", "trend / quality"):
        params.add_column(col, no_wrap=True)
    for p in DETAIL_PARAMS:
        r, stale = b.reading(p, now)
        if r is None:
            continue
        unit = unit_of(p)
        mark = b.mark(p)
        if mark is None:
            value = Text(fmt_value(p, r.value), style="dim strike" if stale else "bold")
            last = Text(b.trends.get(p, ""))
        else:          # not ok: dim, and the reason where the trend would be
            value = _marked(fmt_value(p, r.value), (mark[0], ""))
            last = Text(mark[1], style="magenta dim")
        params.add_row(p, value, unit, ("stale " if stale else "") + fmt_age(r.age(now)),
                       last)
    alarms = Table(box=None, header_style="bold", pad_edge=False, expand=True)
    alarms.add_column("", width=1)
    alarms.add_column("active alarm", no_wrap=True, overflow="ellipsis")
    alarms.add_column("since", no_wrap=True)
    for i, a in enumerate(b.alarms):
        since = a.get("since")
        alarms.add_row(">" if i == alarm_index else "", alarm_label(a),
                       fmt_age(now - since) + " ago" if isinstance(since, int | float) else "")
    if not b.alarms:
        alarms.add_row("", Text("none", style="dim"), "")
    hist = Table(box=None, header_style="bold", pad_edge=False, expand=True)
    for col in ("time", "event", "by"):
        hist.add_column(col, no_wrap=True, overflow="ellipsis")
    for ev in list(b.history)[-max(3, height // 4):][::-1]:
        ts = ev.get("time_s")
        hist.add_row(datetime.fromtimestamp(ts, timezone.utc).strftime("%H:%M:%S") if ts
                     else "", f"{ev.get('phrase') or phrase(str(ev.get('rule')))} {ev.get('transition')}", ev.get("by") or "")
    notes = Table(box=None, header_style="bold", pad_edge=False, expand=True)
    for col in ("time", "note"):
        notes.add_column(col, no_wrap=True, overflow="ellipsis")
    for n in list(b.notes)[-5:][::-1]:
        ts = n.get("time")
        what = n.get("kind") or ""
        if n.get("volume_ml"):
            what += f" {n['volume_ml']:.0f} mL"
        if n.get("param"):
            what += f" ({n['param']})"
        notes.add_row(datetime.fromtimestamp(ts, timezone.utc).strftime("%H:%M:%S") if ts
                      else "", what)
    side = Group(Text("alarms", style="bold"), alarms, Text(""),
                 Text("read-outs", style="bold"), readout_long(b), Text(""),
                 Text("alarm history", style="bold"), hist, Text(""),
                 Text("notes", style="bold"), notes)
    body = Table.grid(padding=(0, 2), expand=True)
    body.add_column(width=min(44, width // 2))
    body.add_column()
    body.add_row(params, side)
    return Group(header(scr, view, now),
                 Panel(body, title=Text(f"{b.key} detail", style="bold"), title_align="left",
                       height=max(8, height - 3)),
                 footer(scr, width))


def readout_long(b: BedState) -> Text:
    t = Text()
    fc = b.fluid_challenge
    if fc is not None:
        d = fc.get("details") or {}
        parts = []
        for k, label in (("baseline", "before"), ("after", "after"),
                         ("change_pct", "change %"), ("cvp_change", "CVP change")):
            v = d.get(k)
            if isinstance(v, int | float):
                parts.append(f"{label} {v:.1f}")
        resp = d.get("responsive")
        t.append(f"fluid challenge: {_outcome(d)}", style="green" if resp else "yellow")
        if parts:
            t.append(" (" + ", ".join(parts) + ")")
        t.append("\n")
    t.append(f"pattern: {b.profile}" if b.profile else "pattern: none",
             style="" if b.profile else "dim")
    t.append("\n(information, not a diagnosis)", style="dim")
    return t
