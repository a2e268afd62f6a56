"""Replay one recording under several configurations and compare their alarm behaviour.

Each configuration's replay goes into its own SQLite database (in a temporary directory
unless ``keep_dir`` is given), in up to two worker processes; the figures are then computed
from what was stored (alarm_events, notes, commands, messages), the same way for every
configuration:

- **bed-days**: the observed span of each bed (first to last measurement time of its
  observation messages), summed, / 86400.
- **alarms**: ``raised`` transitions of physiological and technical alarms (information
  events such as fluid-challenge results and profile read-outs are not alarms), counted by
  the highest priority each alarm reached (a tier or an escalation raises it), by category
  and by rule, in total and per bed-day.
- **alarm-hours**: the time from ``raised`` to ``cleared`` summed over the alarms; an alarm
  still active when the data end is closed at the end of its bed's span (and counted as open).
- **time in each alarm state**: the share of bed-time during which the bed's highest active
  alarm was high, medium or low priority, or there was none.
- **short alarms**: alarms that ended by themselves (not acknowledged) within 2 minutes; many
  of these mark a rule that is noisy rather than informative (common practice, from memory).
- **acknowledgements** (only when the recording holds ``cmd`` messages): alarms acknowledged
  at all and within ``ack_within_s`` of being raised, the median time to acknowledge, and
  recorded commands that addressed no active alarm under this configuration.
- **detection**: for each ``deterioration_onset`` note, the delay from the note to the first
  physiological alarm raised on that bed (and to the first at medium or high priority), up to
  the next onset on the bed, the end of the bed's span or ``detect_within_s``, whichever comes
  first; no alarm in that window is a **missed** event. Alarms already active at the onset are
  listed, since they may already have told staff.

These describe alarm behaviour on the given recording, not clinical validation.
"""

from __future__ import annotations

import csv
import io
import json
import os
import statistics
import tempfile
import time as _time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from ..core.processor import iso
from . import COMPARE_CAUTION
from .data import (PRIORITIES, RANK, AlarmPeriod, build_periods, alarm_rows, commands,
                   load_beds, notes, time_in_state)

SHORT_ALARM_S = 120.0
#: recordings at least this large are replayed in two worker processes by default
PARALLEL_FROM_BYTES = 8_000_000
DAY_S = 86400.0


# ------------------------------------------------------------------------ metrics


def _per_day(n: float, bed_days: float) -> float | None:
    return round(n / bed_days, 3) if bed_days > 0 else None


def _hours(s: float) -> float:
    return round(s / 3600.0, 4)


def metrics(engine, *, ack_within_s: float = 300.0,
            detect_within_s: float = 3600.0) -> dict[str, Any]:
    """The alarm-burden and detection figures of one stored replay (see the module text)."""
    beds = load_beds(engine)
    periods, _info = build_periods(alarm_rows(engine))
    all_notes = notes(engine)
    cmds = commands(engine)

    bed_days = sum(b.span_s for b in beds.values()) / DAY_S
    by_bed: dict[int, list[AlarmPeriod]] = {}
    for p in periods:
        by_bed.setdefault(p.bed_id, []).append(p)

    def end_of(p: AlarmPeriod) -> float:
        b = beds.get(p.bed_id)
        return b.end if b is not None and b.end is not None else p.start

    by_priority = {q: 0 for q in PRIORITIES}
    by_category = {"physiological": 0, "technical": 0}
    rules: dict[str, dict[str, Any]] = {}
    total_s = 0.0
    open_n = 0
    escalated = 0
    for p in periods:
        pk = p.peak_priority
        by_priority[pk] = by_priority.get(pk, 0) + 1
        by_category[p.category] = by_category.get(p.category, 0) + 1
        d = p.duration_s(end_of(p))
        total_s += d
        open_n += p.is_open
        escalated += p.escalated
        r = rules.setdefault(p.rule, {"rule": p.rule, "category": p.category, "alarms": 0,
                                      "high": 0, "medium": 0, "low": 0, "seconds": 0.0,
                                      "short": 0, "durations": []})
        r["alarms"] += 1
        r[pk] += 1
        r["seconds"] += d
        r["durations"].append(d)
        if (not p.is_open and not p.acks and d <= SHORT_ALARM_S):
            r["short"] += 1
    rule_list = []
    for r in sorted(rules.values(), key=lambda r: (-r["alarms"], r["rule"])):
        durs = r.pop("durations")
        secs = r.pop("seconds")
        rule_list.append({**r, "per_bed_day": _per_day(r["alarms"], bed_days),
                          "alarm_hours": _hours(secs),
                          "median_duration_s": round(statistics.median(durs), 1)})

    # share of bed-time in each alarm state
    state_s = {"none": 0.0, "low": 0.0, "medium": 0.0, "high": 0.0}
    span_total = 0.0
    for bid, b in beds.items():
        if b.start is None or b.end is None or b.end <= b.start:
            continue
        span_total += b.end - b.start
        for k, v in time_in_state(by_bed.get(bid, []), b.start, b.end).items():
            state_s[k] += v
    state_share = ({k: round(v / span_total, 6) for k, v in state_s.items()}
                   if span_total > 0 else None)

    # acknowledgements
    if cmds:
        ack_delays = [p.first_ack - p.start for p in periods if p.first_ack is not None]
        acks = {
            "commands": len(cmds),
            "commands_not_applied": sum(1 for c in cmds if c["result"] != "applied"),
            "alarms": len(periods),
            "acknowledged": len(ack_delays),
            "within": sum(1 for d in ack_delays if d <= ack_within_s + 1e-9),
            "within_s": ack_within_s,
            "median_time_to_ack_s": (round(statistics.median(ack_delays), 1)
                                     if ack_delays else None),
        }
    else:
        acks = None

    # detection of marked deteriorations
    onsets = [n for n in all_notes if n["kind"] == "deterioration_onset"]
    events = []
    for i, n in enumerate(onsets):
        b = beds.get(n["bed_id"])
        t0 = float(n["time"])
        horizon = t0 + detect_within_s
        nxt = [float(o["time"]) for o in onsets
               if o["bed_id"] == n["bed_id"] and float(o["time"]) > t0]
        if nxt:
            horizon = min(horizon, min(nxt))
        if b is not None and b.end is not None:
            horizon = min(horizon, max(b.end, t0))
        phys = [p for p in by_bed.get(n["bed_id"], []) if p.category == "physiological"]
        active = sorted({p.rule for p in phys
                         if p.start < t0 and (p.end is None or p.end > t0)})
        first = min((p for p in phys if t0 <= p.start <= horizon),
                    key=lambda p: p.start, default=None)
        strong = None
        for p in phys:
            for t, pri in p.priorities:
                if t0 <= t <= horizon and RANK[pri] >= RANK["medium"]:
                    if strong is None or t < strong[0]:
                        strong = (t, p.rule, pri)
                    break
        events.append({
            "bed": b.key if b else str(n["bed_id"]),
            "onset": iso(t0),
            "text": n.get("text") or n.get("param") or "",
            "window_s": round(horizon - t0, 1),
            "detected": first is not None,
            "delay_s": round(first.start - t0, 1) if first is not None else None,
            "rule": first.rule if first is not None else None,
            "priority": first.raised_priority if first is not None else None,
            "delay_medium_or_high_s": round(strong[0] - t0, 1) if strong else None,
            "rule_medium_or_high": strong[1] if strong else None,
            "active_at_onset": active,
        })
    detected = [e["delay_s"] for e in events if e["detected"]]
    detection = {
        "events": events,
        "detected": len(detected),
        "missed": len(events) - len(detected),
        "median_delay_s": round(statistics.median(detected), 1) if detected else None,
        "max_delay_s": max(detected) if detected else None,
        "within_s": detect_within_s,
    }

    n = len(periods)
    return {
        "beds": sum(1 for b in beds.values() if b.span_s > 0),
        "bed_days": round(bed_days, 6),
        "alarms": n,
        "alarms_per_bed_day": _per_day(n, bed_days),
        "by_priority": {q: {"alarms": by_priority[q],
                            "per_bed_day": _per_day(by_priority[q], bed_days)}
                        for q in PRIORITIES},
        "by_category": by_category,
        "escalated": escalated,
        "open_at_end": open_n,
        "alarm_hours": _hours(total_s),
        "alarm_hours_per_bed_day": _per_day(total_s / 3600.0, bed_days),
        "state_share": state_share,
        "rules": rule_list,
        "acknowledgements": acks,
        "detection": detection,
    }


# ------------------------------------------------------------------------ running


@dataclass
class Job:
    index: int
    label: str
    config_path: str
    recording: str
    db_path: str


_QUEUE = None


def _init_worker(q) -> None:
    global _QUEUE
    _QUEUE = q


def run_job(job: Job, ack_within_s: float, detect_within_s: float,
            progress: Callable[[int, int, int], None] | None = None) -> dict[str, Any]:
    """Replay ``job.recording`` under ``job.config_path`` into ``job.db_path``; figures."""
    from ..config import load_config
    from ..replay import replay_file
    from ..store import open_engine

    cfg = load_config(job.config_path)
    q = _QUEUE
    last = [0.0]

    def prog(done: int, total: int) -> None:
        if progress is not None:
            progress(job.index, done, total)
        elif q is not None:
            now = _time.monotonic()
            if now - last[0] > 0.2 or done >= total:
                last[0] = now
                q.put((job.index, done, total))

    url = f"sqlite:///{job.db_path}"
    t0 = _time.perf_counter()
    s = replay_file(job.recording, url, cfg, progress=prog)
    engine = open_engine(url, create=False)
    try:
        m = metrics(engine, ack_within_s=ack_within_s, detect_within_s=detect_within_s)
    finally:
        engine.dispose()
    return {"label": job.label, "config": job.config_path, "database": job.db_path,
            "replay": {"lines": s.lines, "messages": s.messages, "observations":
                       s.observations, "rejected": s.rejected_total,
                       "alarm_events": s.alarm_events, "seconds": round(s.seconds, 3)},
            "seconds": round(_time.perf_counter() - t0, 3),
            "metrics": m}


def labels_for(paths: list[str]) -> list[str]:
    """Short names for the configurations: their file stems, numbered where they repeat.

    >>> labels_for(["a/wide.toml", "b/narrow.toml", "c/wide.toml"])
    ['wide#1', 'narrow', 'wide#3']
    """
    stems = [Path(p).stem for p in paths]
    return [s if stems.count(s) == 1 else f"{s}#{i + 1}" for i, s in enumerate(stems)]


def compare(recording: str | Path, config_paths: list[str], *, ack_within_s: float = 300.0,
            detect_within_s: float = 3600.0, keep_dir: str | Path | None = None,
            workers: int | None = None,
            progress: Callable[[int, int, int], None] | None = None,
            labels: list[str] | None = None) -> dict[str, Any]:
    """Replay ``recording`` under each configuration; return the comparison as a dict.

    Configuration files are expected to be valid (check them with
    :func:`hemostream.config.load_config` first for readable errors). ``progress(index,
    bytes_done, bytes_total)`` is called in this process as the replays advance.
    """
    rec = str(Path(recording))
    labels = labels or labels_for(config_paths)
    tmp = None
    if keep_dir is None:
        tmp = tempfile.TemporaryDirectory(prefix="hemostream-compare-")
        base = Path(tmp.name)
    else:
        base = Path(keep_dir)
        base.mkdir(parents=True, exist_ok=True)
    jobs = []
    for i, (lab, path) in enumerate(zip(labels, config_paths)):
        safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in lab)
        db = base / f"{i + 1:02d}-{safe}.db"
        for suffix in ("", "-wal", "-shm"):
            Path(str(db) + suffix).unlink(missing_ok=True)
        jobs.append(Job(i, lab, str(path), rec, str(db)))
    if workers is None:
        # a worker process costs about a second to start (imports) and the replays compete
        # for two shared cores: worth it only when each replay takes several seconds
        workers = 2 if Path(rec).stat().st_size >= PARALLEL_FROM_BYTES else 1
    n_workers = max(1, min(workers, 2, len(jobs), os.cpu_count() or 1))
    t0 = _time.perf_counter()
    try:
        if n_workers == 1:
            results = [run_job(j, ack_within_s, detect_within_s, progress) for j in jobs]
        else:
            results = _run_parallel(jobs, n_workers, ack_within_s, detect_within_s, progress)
    finally:
        if tmp is not None:
            tmp.cleanup()
    if tmp is not None:
        for r in results:
            r["database"] = None
    return {
        "recording": rec,
        "caution": COMPARE_CAUTION,
        "ack_within_s": ack_within_s,
        "detect_within_s": detect_within_s,
        "seconds": round(_time.perf_counter() - t0, 3),
        "workers": n_workers,
        "configs": results,
    }


def _run_parallel(jobs: list[Job], n_workers: int, ack_within_s: float,
                  detect_within_s: float,
                  progress: Callable[[int, int, int], None] | None) -> list[dict[str, Any]]:
    import multiprocessing as mp
    import queue as _queue

    # workers start from a clean process (forkserver, or spawn where there is none) rather
    # than a fork of this one, whose progress-bar thread may hold a lock at fork time
    methods = mp.get_all_start_methods()
    ctx = mp.get_context("forkserver" if "forkserver" in methods else "spawn")
    q = ctx.Queue() if progress is not None else None
    with ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx, initializer=_init_worker,
                             initargs=(q,)) as ex:
        futs = [ex.submit(run_job, j, ack_within_s, detect_within_s) for j in jobs]
        while True:
            if q is not None:
                try:
                    while True:
                        progress(*q.get(timeout=0.1))
                except _queue.Empty:
                    pass
            else:
                _time.sleep(0.05)
            if all(f.done() for f in futs):
                break
        results = [f.result() for f in futs]
        if q is not None:
            try:
                while True:
                    progress(*q.get_nowait())
            except _queue.Empty:
                pass
    return results


# ------------------------------------------------------------------------ output


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
