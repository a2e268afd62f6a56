"""Reading stored rows back: observations, derived values, rejects, notes and alarm events."""

from __future__ import annotations

import csv
import json
import sys
from typing import IO, Any, Iterator

from rich import box
from rich.console import Console
from rich.table import Table
from sqlalchemy import select

from .core.wire import format_epoch as iso
from .core.wire import parse_time
from .store import TABLES, config_snapshots, iter_derived, iter_observations

KINDS = ("observations", "derived", "rejected", "notes", "alarms", "admissions", "commands",
         "configs")

# columns shown per kind, in order (after time, care_unit, bed)
_COLUMNS: dict[str, tuple[str, ...]] = {
    "observations": ("param", "value", "unit", "status", "raw_value", "raw_unit", "late",
                     "quality"),
    "derived": ("param", "value", "unit", "inputs", "quality"),
    "notes": ("kind", "param", "volume_ml", "over_min", "duration_s", "by", "text"),
    "alarms": ("alarm_id", "rule", "priority", "category", "transition", "value", "by",
               "details"),
    "admissions": ("height_cm", "weight_kg", "bsa_m2", "bsa_formula", "limits", "discharged"),
    "commands": ("action", "alarm", "by", "result"),
    "rejected": ("topic", "category", "reason", "obs_index", "device", "seq", "size"),
}


def parse_since(text: str) -> float:
    return parse_time(text, "--since")


def rows(engine, kind: str, bed: str | None = None, param: str | None = None,
         since: float | None = None, limit: int | None = None,
         quality: list[str] | None = None) -> Iterator[dict[str, Any]]:
    """Rows of ``kind`` as dicts with RFC 3339 times, oldest first. ``quality``: only
    observations or derived values of these qualities (core/quality.py)."""
    if quality is not None and kind not in ("observations", "derived"):
        raise ValueError(f"--quality applies to observations and derived values, "
                         f"not to {kind}")
    if kind == "configs":          # configurations in force (store.config_snapshots)
        yield from ({**c, "time": iso(c["time"])} for c in config_snapshots(engine, since, limit))
        return
    if kind in ("observations", "derived"):
        yield from _chunked_rows(engine, kind, bed, param, since, limit, quality)
        return
    table = TABLES["alarm_events" if kind == "alarms" else kind]
    beds = TABLES["beds"]
    if kind == "rejected":
        stmt = select(table)
        tcol = table.c.rx
        if bed:
            stmt = stmt.where(table.c.topic.like(f"%/{bed.split('/')[-1]}/%"))
    else:
        stmt = select(table, beds.c.unit.label("care_unit"), beds.c.bed.label("bed_name")
                      ).join(beds, table.c.bed_id == beds.c.id)
        tcol = table.c.time
        if bed:
            if "/" in bed:
                u, b = bed.split("/", 1)
                stmt = stmt.where(beds.c.unit == u, beds.c.bed == b)
            else:
                stmt = stmt.where(beds.c.bed == bed)
    if param and "param" in table.c:
        stmt = stmt.where(table.c.param == param)
    elif param and kind == "alarms":
        stmt = stmt.where(table.c.rule == param)
    if since is not None:
        stmt = stmt.where(tcol >= since)
    # rejects in arrival order (unreadable lines have no arrival time); the rest by time
    stmt = stmt.order_by(table.c.id) if kind == "rejected" else stmt.order_by(tcol, table.c.id)
    if limit:
        stmt = stmt.limit(limit)
    with engine.connect() as conn:
        for r in conn.execute(stmt):
            m = r._mapping
            if kind == "rejected":
                out = {"rx": iso(m["rx"]) if m["rx"] is not None else None}
                for c in _COLUMNS[kind]:
                    out[c] = m[c]
                raw = m["raw"]
                out["raw"] = raw.decode("utf-8", "replace") if raw is not None else None
            else:
                out = {"time": iso(m["time"]), "care_unit": m["care_unit"],
                       "bed": m["bed_name"]}
                for c in _COLUMNS[kind]:
                    v = m[c]
                    if c in ("inputs", "details", "limits") and isinstance(v, str):
                        v = json.loads(v)
                        if c == "inputs":   # stored as epoch seconds, shown as RFC 3339
                            v = [[p, iso(t) if isinstance(t, float | int) else t]
                                 for p, t in v]
                    out[c] = v
            yield out


def _bed_ids(conn, bed: str | None) -> dict[int, tuple[str, str]]:
    beds = TABLES["beds"]
    stmt = select(beds.c.id, beds.c.unit, beds.c.bed)
    if bed:
        if "/" in bed:
            u, b = bed.split("/", 1)
            stmt = stmt.where(beds.c.unit == u, beds.c.bed == b)
        else:
            stmt = stmt.where(beds.c.bed == bed)
    return {r.id: (r.unit, r.bed) for r in conn.execute(stmt)}


def _chunked_rows(engine, kind: str, bed: str | None, param: str | None,
                  since: float | None, limit: int | None,
                  quality: list[str] | None = None) -> Iterator[dict[str, Any]]:
    """Observations or derived values (stored in chunks), as :func:`rows` gives them."""
    with engine.connect() as conn:
        names = _bed_ids(conn, bed)
        if not names:
            return
        ids = list(names) if bed else None
        params = [param] if param else None
        n = 0
        if kind == "observations":
            for t, _mid, b, p, v, u, st, rv, ru, late, q in iter_observations(
                    conn, ids, params, since, quality=quality):
                unit, bed_name = names[b]
                yield {"time": iso(t), "care_unit": unit, "bed": bed_name, "param": p,
                       "value": v, "unit": u, "status": st, "raw_value": rv, "raw_unit": ru,
                       "late": late, "quality": q}
                n += 1
                if limit and n >= limit:
                    return
        else:
            for t, _seq, b, p, v, u, inputs, q in iter_derived(conn, ids, params, since,
                                                                 quality=quality):
                unit, bed_name = names[b]
                pairs = [[ip, iso(x) if isinstance(x, float | int) else x]
                         for ip, x in json.loads(inputs)]
                yield {"time": iso(t), "care_unit": unit, "bed": bed_name, "param": p,
                       "value": v, "unit": u, "inputs": pairs, "quality": q}
                n += 1
                if limit and n >= limit:
                    return


#: the narrower set of columns the table format shows (jsonl and csv carry everything)
TABLE_COLUMNS: dict[str, tuple[str, ...]] = {
    "observations": ("time", "bed", "param", "value", "unit", "status", "late", "quality"),
    "derived": ("time", "bed", "param", "value", "unit", "quality"),
    "notes": ("time", "bed", "kind", "param", "volume_ml", "by"),
    "alarms": ("time", "bed", "rule", "priority", "transition", "by"),
    "admissions": ("time", "bed", "height_cm", "weight_kg", "bsa_m2", "discharged"),
    "commands": ("time", "bed", "action", "alarm", "by", "result"),
    "rejected": ("rx", "topic", "category", "reason"),
    "configs": ("time", "sha256"),
}


def write(rows_iter, fmt: str, stream: IO[str] = sys.stdout, console=None,
          kind: str | None = None) -> int:
    n = 0
    if fmt == "jsonl":
        for r in rows_iter:
            stream.write(json.dumps(r, separators=(",", ":"), default=str) + "\n")
            n += 1
        return n
    if fmt == "csv":
        w = None
        for r in rows_iter:
            if w is None:
                w = csv.DictWriter(stream, fieldnames=list(r))
                w.writeheader()
            w.writerow({k: json.dumps(v) if isinstance(v, dict | list) else v
                        for k, v in r.items()})
            n += 1
        return n

    console = console or Console()
    table = None
    cols = TABLE_COLUMNS.get(kind or "")
    for r in rows_iter:
        if "care_unit" in r:
            r["bed"] = f"{r.pop('care_unit')}/{r['bed']}"
        if cols:
            r = {c: r.get(c) for c in cols}
        for tk in ("time", "rx"):      # compact in the table: MM-DD HH:MM:SS (UTC)
            if isinstance(r.get(tk), str) and len(r[tk]) >= 19:
                r[tk] = r[tk][5:10] + " " + r[tk][11:19]
        if table is None:
            table = Table(*r.keys(), box=box.SIMPLE_HEAD, pad_edge=False,
                          caption="times UTC", caption_justify="left")
            for c in table.columns[:-1]:
                c.no_wrap = True
            table.columns[-1].overflow = "fold"
            table.columns[-1].min_width = 12
        table.add_row(*(_cell(v) for v in r.values()))
        n += 1
    if table is None:
        console.print("no rows")
    else:
        console.print(table)
    return n


def _cell(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        return f"{v:.4g}" if abs(v) < 1e4 else f"{v:.0f}"
    if isinstance(v, dict | list):
        s = json.dumps(v, separators=(",", ":"))
        return s if len(s) < 80 else s[:77] + "..."
    s = str(v)
    return s if len(s) < 120 else s[:117] + "..."
