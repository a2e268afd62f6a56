"""A database holding 30 days of a 24-bed unit, made fast without the pipeline; the cost
per message on it against an empty one, and a one-bed, one-parameter, 24-hour query on it.

    python -m benchmarks.month_db                      # 24 beds x 30 days, SQLite
    python -m benchmarks.month_db --days 3 --out /tmp/month.json

How the database is made: one bed's 15-minute recording (benchmarks/make_load.py, 960 s)
goes through ``hemostream replay`` once, which gives one real sealed chunk (observations,
derived values, provenance, the messages). That chunk is the template: every bed's every
quarter hour of the 30 days gets a row of ``obs_chunks`` with its own metadata (bed, time
span, message ids, counts) and the template's bytes (same size and make-up as a real one).
The queried bed's last day is exact: its 96 chunks are the template's columns shifted to
their own times and ids and encoded again, so the query returns real, ordered rows.
Nothing else reads the copies' insides: the writer decodes only unsealed segments, and the
start-up reads the identities of the most recent messages (copies' identities are of the
template's past times, so nothing of the measured recording is taken for a duplicate).

Measured, same run, whole processes: ``hemostream replay`` of a 24-bed, ``--seconds``
recording (times after the 30 days) into a fresh empty database and into the 30-day one
(each of ``--repeats`` rounds with a recording of its own, shifted in time, so nothing is a
duplicate); the ratio is best filled / best empty (target <= 1.25). Then ``hemostream query
observations --bed B --param HR --since (end - 24 h)`` on the 30-day database (target < 1 s;
:mod:`benchmarks.query_month` measures that query alone, several times, against the command's
own start-up, ``hemostream --help``).
"""

from __future__ import annotations

import argparse
import json
import sqlite3
import sys
import tempfile
from datetime import timedelta
from pathlib import Path

import numpy as np

from . import make_load
from .machine import PY, load_average, remove_db, run_measured

QUARTER = 900
TARGET_RATIO, TARGET_QUERY_S = 1.25, 1.0


def template(work: Path) -> dict:
    """One real sealed chunk (and its row) from a one-bed replay of 960 s."""
    rec, db = work / "tpl.jsonl", work / "tpl.db"
    make_load.write(str(rec), 1, 960)
    run_measured([PY, "-m", "hemostream.cli", "replay", str(rec), "--db",
                  f"sqlite:///{db}", "--json"]).check()
    con = sqlite3.connect(db)
    con.row_factory = sqlite3.Row
    row = dict(con.execute("SELECT * FROM obs_chunks WHERE sealed = 1 ORDER BY id LIMIT 1")
               .fetchone())
    con.close()
    return row


def _shifted(tpl: dict, dt: float, did: int, dseq: int, level: int = 9) -> dict:
    from hemostream.store.chunks import chunk_row, decode

    b = decode(tpl["data"])
    for c in ("o_time", "d_time", "m_time", "m_rx"):
        b[c] = b[c] + dt
    for c in ("o_mid", "m_id"):
        b[c] = b[c] + did
    b["d_seq"] = b["d_seq"] + dseq
    return chunk_row(0, b, True, level)


def build(db: Path, tpl: dict, beds: int, days: int, end: float) -> dict:
    """The 30-day database at ``db`` (times up to ``end``); what it holds."""
    from hemostream.store import open_engine

    url = f"sqlite:///{db}"
    open_engine(url).dispose()                      # the schema, at the newest revision
    n_msg = int(tpl["m_count"])
    n_der = int(tpl["n_derived"])
    span = float(tpl["t_max"]) - float(tpl["t_min"])
    start = end - days * 86400.0
    slots = int(days * 86400 // QUARTER)
    con = sqlite3.connect(db)
    con.executemany("INSERT INTO beds (id, unit, bed) VALUES (?, ?, ?)",
                    [(b + 1, "LOAD", f"bed-{b:04d}") for b in range(beds)])
    cols = ("bed_id", "t_min", "t_max", "n_messages", "m_count", "mid_max", "rx_max",
            "msg_t_min", "msg_t_max", "n_obs", "n_derived", "seq_max", "sealed", "data")
    sql = f"INSERT INTO obs_chunks ({', '.join(cols)}) VALUES ({', '.join('?' * len(cols))})"
    mid = seq = 0
    exact = 0
    for k in range(slots):
        t0 = start + k * QUARTER
        rows = []
        for b in range(beds):
            mid += n_msg
            seq += n_der
            if b == 0 and t0 >= end - 86400.0:      # the queried bed's last day: exact
                r = _shifted(tpl, t0 - float(tpl["t_min"]), mid - int(tpl["mid_max"]),
                             seq - int(tpl["seq_max"]))
                exact += 1
                rows.append((1, r["t_min"], r["t_max"], r["n_messages"], r["m_count"],
                             r["mid_max"], r["rx_max"], r["msg_t_min"], r["msg_t_max"],
                             r["n_obs"], r["n_derived"], r["seq_max"], 1, r["data"]))
                continue
            rows.append((b + 1, t0, t0 + span, tpl["n_messages"], n_msg, mid,
                         t0 + span + 0.05, t0, t0 + span, tpl["n_obs"], n_der, seq, 1,
                         tpl["data"]))
        con.executemany(sql, rows)
        if k % 500 == 0:
            con.commit()
    con.commit()
    con.close()
    return {"beds": beds, "days": days, "chunks": slots * beds, "exact_chunks": exact,
            "messages": mid, "observations": slots * beds * int(tpl["n_obs"]),
            "bytes": sum(f.stat().st_size for f in (db, Path(f"{db}-wal")) if f.exists())}


def _recording(path: Path, beds: int, seconds: int, shift_h: int) -> None:
    saved = make_load.START
    make_load.START = saved + timedelta(hours=shift_h)
    try:
        make_load.write(str(path), beds, seconds)
    finally:
        make_load.START = saved


def measure(work: Path, beds: int, days: int, seconds: int, repeats: int) -> dict:
    tpl = template(work)
    end = make_load.START.timestamp() - 120.0       # just before the recordings' admits
    full = work / "month.db"
    held = build(full, tpl, beds, days, end)
    empty_s, full_s = [], []
    for i in range(repeats):
        rec = work / f"load{i}.jsonl"
        _recording(rec, beds, seconds, 2 * i)
        e = work / "empty.db"
        remove_db(e)
        empty_s.append(run_measured([PY, "-m", "hemostream.cli", "replay", str(rec), "--db",
                                     f"sqlite:///{e}", "--json"]).check().seconds)
        full_s.append(run_measured([PY, "-m", "hemostream.cli", "replay", str(rec), "--db",
                                    f"sqlite:///{full}", "--json"]).check().seconds)
    since = make_load._t(make_load.START - timedelta(seconds=120 + 86400))
    q = [run_measured([PY, "-m", "hemostream.cli", "query", "observations", "--db",
                       f"sqlite:///{full}", "--bed", "LOAD/bed-0000", "--param", "HR",
                       "--since", since, "--format", "jsonl"]) for _ in range(repeats)]
    for m in q:
        m.check()
    rows = q[0].stdout.count("\n")
    lines = beds * (seconds + 1)
    ratio = min(full_s) / min(empty_s)
    qs = min(m.seconds for m in q)
    return {"database": held, "recording": f"{beds} beds x {seconds} s ({lines} lines)",
            "empty_seconds": [round(x, 3) for x in empty_s],
            "full_seconds": [round(x, 3) for x in full_s],
            "per_message_us_empty": round(min(empty_s) / lines * 1e6, 1),
            "per_message_us_full": round(min(full_s) / lines * 1e6, 1),
            "cost_ratio": round(ratio, 3), "target_ratio": TARGET_RATIO,
            "pass_ratio": ratio <= TARGET_RATIO,
            "query_seconds": round(qs, 3), "query_rows": rows,
            "query_cpu_seconds": round(min(m.user_s + m.sys_s for m in q), 3),
            "target_query_s": TARGET_QUERY_S, "pass_query": qs < TARGET_QUERY_S,
            "load_average": load_average()}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--beds", type=int, default=24)
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--seconds", type=int, default=600)
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--out")
    ap.add_argument("--workdir")
    a = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=a.workdir) as d:
        r = measure(Path(d), a.beds, a.days, a.seconds, a.repeats)
    text = json.dumps(r, indent=2)
    print(text)
    if a.out:
        Path(a.out).write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
