"""The comparison as output: terminal table (rich), CSV and JSON."""

from __future__ import annotations

import csv
import io
import json
from typing import Any, Callable

from . import COMPARE_CAUTION
from .periods import PRIORITIES


def _fmt(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        if abs(v) >= 100:
            return f"{v:,.0f}"
        if abs(v) >= 10:
            return f"{v:.1f}"
        return f"{v:.3g}" if v else "0"
    return str(v)


def table_rows(result: dict[str, Any]) -> list[tuple[str, str, list[Any]]]:
    """The comparison as (section, metric, [value per configuration]) rows: what the
    terminal table, the CSV file and a spreadsheet show side by side."""
    cfgs = [c["metrics"] for c in result["configs"]]
    rows: list[tuple[str, str, list[Any]]] = []

    def add(section: str, name: str, get: Callable[[dict], Any]) -> None:
        vals = []
        for m in cfgs:
            try:
                vals.append(get(m))
            except (KeyError, TypeError, IndexError):
                vals.append(None)
        rows.append((section, name, vals))

    add("overview", "beds", lambda m: m["beds"])
    add("overview", "bed-days", lambda m: m["bed_days"])
    add("overview", "alarms", lambda m: m["alarms"])
    add("overview", "alarms per bed-day", lambda m: m["alarms_per_bed_day"])
    add("overview", "alarm-hours", lambda m: m["alarm_hours"])
    add("overview", "alarm-hours per bed-day", lambda m: m["alarm_hours_per_bed_day"])
    add("overview", "escalated to high", lambda m: m["escalated"])
    add("overview", "still active at the end", lambda m: m["open_at_end"])
    for q in PRIORITIES:
        add("by priority", f"{q}: alarms", lambda m, q=q: m["by_priority"][q]["alarms"])
        add("by priority", f"{q}: per bed-day",
            lambda m, q=q: m["by_priority"][q]["per_bed_day"])
    for c in ("physiological", "technical"):
        add("by category", c, lambda m, c=c: m["by_category"][c])
    for s in ("none", "low", "medium", "high"):
        add("time in alarm state", f"{s} (% of bed-time)",
            lambda m, s=s: round(100 * m["state_share"][s], 2))
    rule_names: list[str] = []
    for m in cfgs:
        for r in m["rules"]:
            if r["rule"] not in rule_names:
                rule_names.append(r["rule"])

    def rule(m: dict, name: str) -> dict | None:
        return next((r for r in m["rules"] if r["rule"] == name), None)

    for name in rule_names:
        add("by rule", f"{name}: alarms", lambda m, n=name: (rule(m, n) or {}).get("alarms", 0))
        add("by rule", f"{name}: per bed-day",
            lambda m, n=name: (rule(m, n) or {}).get("per_bed_day", 0.0))
        add("by rule", f"{name}: alarm-hours",
            lambda m, n=name: (rule(m, n) or {}).get("alarm_hours", 0.0))
        add("by rule", f"{name}: short (< 2 min, ended by itself)",
            lambda m, n=name: (rule(m, n) or {}).get("short", 0))
    if any(m["acknowledgements"] for m in cfgs):
        mins = result["ack_within_s"] / 60
        add("acknowledgements", "alarms acknowledged",
            lambda m: m["acknowledgements"]["acknowledged"])
        add("acknowledgements", f"acknowledged within {mins:g} min",
            lambda m: m["acknowledgements"]["within"])
        add("acknowledgements", f"% of alarms acknowledged within {mins:g} min",
            lambda m: round(100 * m["acknowledgements"]["within"] / m["alarms"], 1)
            if m["alarms"] else None)
        add("acknowledgements", "median time to acknowledge (s)",
            lambda m: m["acknowledgements"]["median_time_to_ack_s"])
        add("acknowledgements", "recorded commands that found no alarm",
            lambda m: m["acknowledgements"]["commands_not_applied"])
    det = cfgs[0]["detection"]["events"] if cfgs else []
    if det:
        add("detection", "marked deteriorations", lambda m: len(m["detection"]["events"]))
        add("detection", "detected", lambda m: m["detection"]["detected"])
        add("detection", "missed", lambda m: m["detection"]["missed"])
        if any(m["detection"].get("too_late") for m in cfgs):
            mins = cfgs[0]["detection"]["within_s"] / 60.0
            add("detection", f"too late in the recording to judge (< {mins:g} min left)",
                lambda m: m["detection"].get("too_late", 0))
        add("detection", "median delay (s)", lambda m: m["detection"]["median_delay_s"])
        add("detection", "longest delay (s)", lambda m: m["detection"]["max_delay_s"])
        for i, e in enumerate(det):
            what = _event_name(e)
            add("detection events", f"{what}: delay (s)",
                lambda m, i=i: _delay_text(m["detection"]["events"][i]))
            add("detection events", f"{what}: first rule",
                lambda m, i=i: m["detection"]["events"][i]["rule"])
            add("detection events", f"{what}: to medium/high (s)",
                lambda m, i=i: m["detection"]["events"][i]["delay_medium_or_high_s"])
    return rows


def _event_name(e: dict, width: int | None = None) -> str:
    text = e["text"]
    if width is not None and len(text) > width:
        text = text[: width - 1] + "…"
    return f"{e['bed']} {e['onset'][:10]} {e['onset'][11:19]}" + (f" {text}" if text else "")


def _delay_text(e: dict) -> Any:
    if e["detected"]:
        return e["delay_s"]
    if e.get("too_late"):
        return f"too late to judge (no alarm, {e['window_s'] / 60:.0f} min left)"
    return "missed" + (f" (active before: {', '.join(e['active_at_onset'])})"
                       if e["active_at_onset"] else "")


def _diff(vals: list[Any]) -> Any:
    if len(vals) != 2:
        return None
    a, b = vals
    if isinstance(a, bool) or isinstance(b, bool):
        return None
    if isinstance(a, int | float) and isinstance(b, int | float):
        d = b - a
        return round(d, 6) if isinstance(d, float) else d
    return None


def to_csv(result: dict[str, Any]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf)
    labels = [c["label"] for c in result["configs"]]
    two = len(labels) == 2
    w.writerow(["section", "metric", *labels, *([f"{labels[1]} - {labels[0]}"] if two else [])])
    for section, name, vals in table_rows(result):
        w.writerow([section, name, *["" if v is None else v for v in vals],
                    *([("" if _diff(vals) is None else _diff(vals))] if two else [])])
    return buf.getvalue()


def to_json(result: dict[str, Any]) -> str:
    return json.dumps(result, indent=2, default=str)


def render(result: dict[str, Any], console) -> None:
    """The comparison as rich tables, configurations side by side."""
    from rich.table import Table

    labels = [c["label"] for c in result["configs"]]
    cfgs = [c["metrics"] for c in result["configs"]]
    two = len(labels) == 2
    console.print(f"[bold]compared[/] {result['recording']} under {len(labels)} "
                  f"configuration(s) in {result['seconds']:.1f} s", highlight=False)
    for c in result["configs"]:
        r = c["replay"]
        console.print(f"  {c['label']}: {c['config']}   ({r['lines']} lines, "
                      f"{r['alarm_events']} alarm events, {c['seconds']:.1f} s"
                      + (f", kept in {c['database']}" if c.get("database") else "") + ")",
                      highlight=False)

    hours = min((c["metrics"].get("bed_days") or 0) for c in result["configs"]) * 24 \
        if result["configs"] else 0
    nbeds = max((int(c["metrics"].get("beds") or 0) for c in result["configs"]), default=0)
    if 0 < hours and (hours / max(1, nbeds)) < 24:
        console.print(f"  note: per bed-day figures are extrapolated from "
                      f"{hours:.1f} bed-hour(s) of recording (x{24 * max(1, nbeds) / hours:.0f}"
                      " per bed); read them as rates, not counts", highlight=False)

    def new_table(title: str, first: str = "") -> Table:
        t = Table(title=title, title_justify="left", title_style="bold", show_edge=False)
        t.add_column(first)
        for lab in labels:
            t.add_column(lab, justify="right")
        if two:
            t.add_column("difference", justify="right", style="dim")
        return t

    current = None
    table = None
    for section, name, vals in table_rows(result):
        if section in ("by rule", "detection events"):
            continue
        if section != current:
            if table is not None:
                console.print(table)
            current = section
            table = new_table(section)
        d = _diff(vals) if two else None
        table.add_row(name, *[_fmt(v) for v in vals],
                      *([_fmt(d) if d is not None else ""] if two else []))
    if table is not None:
        console.print(table)

    # one row per rule: alarms, alarm-hours and short alarms under each configuration
    names: list[str] = []
    for m in cfgs:
        names += [r["rule"] for r in m["rules"] if r["rule"] not in names]
    if names:
        t = new_table("by rule: alarms / alarm-hours / short (< 2 min, ended by itself)",
                      "rule")
        for name in names:
            cells, counts = [], []
            for m in cfgs:
                r = next((x for x in m["rules"] if x["rule"] == name), None)
                counts.append(r["alarms"] if r else 0)
                cells.append(f"{r['alarms']} / {r['alarm_hours']:.2f} h / {r['short']}"
                             if r else "0")
            d = _diff(counts) if two else None
            t.add_row(name, *cells, *([f"{d:+d}" if d else ""] if two else []))
        console.print(t)

    events = cfgs[0]["detection"]["events"] if cfgs else []
    if events:
        t = new_table("detection delay per marked deterioration (to the first alarm; "
                      "to medium/high)", "onset")
        for i, e in enumerate(events):
            cells, delays = [], []
            for m in cfgs:
                x = m["detection"]["events"][i]
                delays.append(x["delay_s"])
                if x["detected"]:
                    strong = x["delay_medium_or_high_s"]
                    cells.append(f"{x['delay_s']:.0f} s {x['rule']} ({x['priority']}); "
                                 + (f"{strong:.0f} s" if strong is not None else "-"))
                else:
                    cells.append(_delay_text(x))
            d = _diff(delays) if two else None
            t.add_row(_event_name(e, 40), *cells,
                      *([f"{d:+.0f} s" if d else ""] if two else []))
        console.print(t)
    console.print(f"[dim]{COMPARE_CAUTION}[/]")
