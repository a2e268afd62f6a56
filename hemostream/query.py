"""Reading stored rows back: observations, derived values, rejects, notes and alarm events.

Light to import (no rich until a table is printed, no payload models): ``hemostream query``
spends its time on the rows. :func:`output` writes observations as jsonl or csv in batches,
a line per row from a template per bed, parameter and the like (no dict per row); the text
is byte for byte what :func:`write` of :func:`rows` gives, which the other kinds and the
table still use.
"""

from __future__ import annotations

import csv
import json
import sys
from itertools import islice
from operator import itemgetter
from typing import IO, Any, Callable, Iterator

from sqlalchemy import select

from .core.timetext import format_epoch as iso
from .core.timetext import format_epochs, parse_time
from .kinds import KINDS  # noqa: F401  (re-exported)
from .store import TABLES, config_snapshots, iter_derived, iter_observations


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
        enc = json.JSONEncoder(separators=(",", ":"), default=str).encode   # made once
        for r in rows_iter:
            stream.write(enc(r) + "\n")
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

    from rich import box
    from rich.console import Console
    from rich.table import Table

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


# --------------------------------------------------------------------------- fast output

#: the fields of an observation row, in order (as :func:`rows` gives them)
OBS_FIELDS = ("time", "care_unit", "bed", "param", "value", "unit", "status", "raw_value",
              "raw_unit", "late", "quality")
#: rows formatted at a time
BATCH = 4096


def output(engine, kind: str, bed: str | None = None, param: str | None = None,
           since: float | None = None, limit: int | None = None,
           quality: list[str] | None = None, fmt: str = "table",
           stream: IO[str] = sys.stdout) -> int:
    """Write the rows of ``kind`` in ``fmt`` to ``stream``, as ``write(rows(...))`` does;
    the number of rows."""
    if kind == "observations" and fmt in ("jsonl", "csv"):
        batches = _observation_batches(engine, bed, param, since, limit, quality)
        return (_obs_jsonl if fmt == "jsonl" else _obs_csv)(batches, stream)
    return write(rows(engine, kind, bed, param, since, limit, quality), fmt, stream,
                 kind=kind)


def _observation_batches(engine, bed: str | None, param: str | None, since: float | None,
                         limit: int | None, quality: list[str] | None
                         ) -> Iterator[tuple[dict[int, tuple[str, str]], list[tuple]]]:
    """(bed id -> (unit, bed), rows of :func:`iter_observations`), :data:`BATCH` rows at a
    time."""
    with engine.connect() as conn:
        names = _bed_ids(conn, bed)
        if not names:
            return
        it: Iterator[tuple] = iter_observations(conn, list(names) if bed else None,
                                                [param] if param else None, since,
                                                quality=quality)
        if limit:
            it = islice(it, limit)
        while batch := list(islice(it, BATCH)):
            yield names, batch


def _numbers(enc: Callable[[Any], str], col: list) -> list[str]:
    """Each value's JSON text, as the encoder writes it alone."""
    if set(map(type, col)) <= {float, int}:     # one call; numbers' text has no comma
        return enc(col)[1:-1].split(",")
    return list(map(enc, col))


#: the columns of an observation row (of iter_observations) that are neither the time nor
#: a number: bed id, param, unit, status, raw unit, late, quality
_CONSTANT = itemgetter(2, 3, 5, 6, 8, 9, 10)


class _Templates(dict):
    """A jsonl line's text with %s for the time and the two values, per the rest of the
    row (bed, parameter, units, status, late, quality: few of them)."""

    def __init__(self, names: dict[int, tuple[str, str]], enc: Callable[[Any], str]) -> None:
        super().__init__()
        self.names, self.enc = names, enc

    def __missing__(self, key: tuple) -> str:
        b, p, u, st, ru, late, q = key
        unit, bed = self.names[b]
        e = self.enc
        text = ["{" + '"time":"%sZ"']
        for k, v in (("care_unit", unit), ("bed", bed), ("param", p), ("value", None),
                     ("unit", u), ("status", st), ("raw_value", None), ("raw_unit", ru),
                     ("late", late), ("quality", q)):
            text.append(f'"{k}":' + ("%s" if v is None and k in ("value", "raw_value")
                                     else e(v).replace("%", "%%")))
        self[key] = out = ",".join(text) + "}\n"
        return out


def _obs_jsonl(batches, stream: IO[str]) -> int:
    enc = json.JSONEncoder(separators=(",", ":"), default=str).encode  # as write() has it
    n = 0
    templates = None
    for names, batch in batches:
        if templates is None:
            templates = _Templates(names, enc)
        times = format_epochs([r[0] for r in batch], suffix="")
        values = _numbers(enc, [r[4] for r in batch])
        raws = _numbers(enc, [r[7] for r in batch])
        stream.write("".join(map(str.__mod__, map(templates.__getitem__, map(_CONSTANT, batch)),
                                 zip(times, values, raws))))
        n += len(batch)
    return n


def _obs_csv(batches, stream: IO[str]) -> int:
    w = csv.writer(stream)          # csv.DictWriter's defaults (the excel dialect)
    n = 0
    for names, batch in batches:
        if not n:
            w.writerow(OBS_FIELDS)
        times = format_epochs([r[0] for r in batch])
        w.writerows([(t, *names[r[2]], *r[3:]) for t, r in zip(times, batch)])
        n += len(batch)
    return n
