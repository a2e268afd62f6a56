"""Storage figures: database bytes per bed-day and replay throughput, same run.

    python -m benchmarks.storage                    # 24 beds x 30 min of 1 Hz, 10 obs/message
    python -m benchmarks.storage --beds 24 --seconds 3600 --out /tmp/storage.json
    python -m benchmarks.storage --pg               # PostgreSQL too (127.0.0.1:5432/test)

The recording is benchmarks/make_load.py's (the replay figure's shape: one admit per bed, then
every bed every second, 10 observations per message). ``hemostream replay`` writes a fresh
SQLite file; its size (file + WAL after the replay process has exited, indexes included) is
scaled to a bed-day: bytes x 86,400 / (beds x seconds). The replay is timed against bare
validation of the same lines (benchmarks/validate_lines.py), best of ``--repeats``, whole
processes with start-up: the ratio of figure 1 of benchmarks/run.py, at this size. The
per-table sizes come from SQLite's ``dbstat`` virtual table when the build has it.
"""

from __future__ import annotations

import argparse
import json
import sqlite3
import sys
import tempfile
from pathlib import Path

from . import make_load
from .machine import PY, load_average, remove_db, run_measured

TARGET_MB_PER_BED_DAY = 10.0


def db_bytes(db: Path) -> int:
    return sum(f.stat().st_size for f in (db, Path(f"{db}-wal")) if f.exists())


def table_bytes(db: Path) -> dict[str, int]:
    try:
        con = sqlite3.connect(db)
        rows = con.execute("SELECT name, sum(pgsize) FROM dbstat GROUP BY name "
                           "ORDER BY 2 DESC").fetchall()
        con.close()
        return {n: int(s) for n, s in rows}
    except sqlite3.Error:
        return {}


def measure(work: Path, beds: int, seconds: int, repeats: int) -> dict:
    rec = work / "storage.jsonl"
    lines = make_load.write(str(rec), beds, seconds)
    db = work / "storage.db"
    base, pipe = [], []
    for _ in range(repeats):
        base.append(run_measured([PY, "-m", "benchmarks.validate_lines", str(rec)]).check())
        remove_db(db)
        m = run_measured([PY, "-m", "hemostream.cli", "replay", str(rec), "--db",
                          f"sqlite:///{db}", "--json"]).check()
        pipe.append(m)
    size = db_bytes(db)
    tables = table_bytes(db)
    b = min(m.seconds for m in base)
    p = min(m.seconds for m in pipe)
    bed_days = beds * seconds / 86400.0
    per_day = size / bed_days
    return {
        "recording": f"{beds} beds x {seconds} s at 1 Hz, 10 observations per message",
        "lines": lines, "recording_bytes": rec.stat().st_size,
        "database_bytes": size, "bytes_per_bed_day": round(per_day),
        "mb_per_bed_day": round(per_day / 1e6, 2),
        "target_mb_per_bed_day": TARGET_MB_PER_BED_DAY,
        "pass": per_day / 1e6 <= TARGET_MB_PER_BED_DAY,
        "tables_bytes": tables,
        "replay_seconds": round(p, 3), "validation_seconds": round(b, 3),
        "replay_ratio": round(b / p, 4),
        "load_average": load_average(),
    }


PG = "postgresql+psycopg://127.0.0.1:5432/test"


def measure_pg(work: Path, beds: int, seconds: int, base_url: str = PG) -> dict:
    """The same recording replayed into a fresh PostgreSQL schema; its size (every table,
    partitions and indexes and TOAST included: pg_total_relation_size) after a VACUUM, so
    dead rows of merged segments do not count, scaled to a bed-day."""
    import uuid

    from sqlalchemy import create_engine, text

    rec = work / "storage.jsonl"
    if not rec.exists():
        make_load.write(str(rec), beds, seconds)
    schema = f"hs_bench_{uuid.uuid4().hex[:8]}"
    admin = create_engine(base_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as c:
        c.execute(text(f"CREATE SCHEMA {schema}"))
    url = f"{base_url}?options=-csearch_path%3D{schema}"
    try:
        m = run_measured([PY, "-m", "hemostream.cli", "replay", str(rec), "--db", url,
                          "--json"]).check()
        from hemostream.store import open_engine
        from hemostream.store.retention import table_bytes
        eng = open_engine(url, create=False)
        with eng.connect().execution_options(isolation_level="AUTOCOMMIT") as c:
            c.exec_driver_sql("VACUUM")
        sizes = {k: v for k, v in table_bytes(eng).items() if v}
        # the live rows alone (VACUUM FULL rewrites every table): what a long run's tables
        # approach per bed-day, the space of rows already deleted (observation messages
        # moved into sealed chunks, merged segments) being reused after autovacuum
        with eng.connect().execution_options(isolation_level="AUTOCOMMIT") as c:
            c.exec_driver_sql("VACUUM FULL")
        live = {k: v for k, v in table_bytes(eng).items() if v}
        eng.dispose()
    finally:
        with admin.connect() as c:
            c.execute(text(f"DROP SCHEMA {schema} CASCADE"))
        admin.dispose()
    total = sum(sizes.values())
    per_day = total / (beds * seconds / 86400.0)
    live_day = sum(live.values()) / (beds * seconds / 86400.0)
    return {"database_bytes": total, "bytes_per_bed_day": round(per_day),
            "mb_per_bed_day": round(per_day / 1e6, 2), "tables_bytes": sizes,
            "live_mb_per_bed_day": round(live_day / 1e6, 2), "live_tables_bytes": live,
            "replay_seconds": round(m.seconds, 3)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--beds", type=int, default=24)
    ap.add_argument("--seconds", type=int, default=1800)
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--out", help="write the figures as JSON here")
    ap.add_argument("--workdir")
    ap.add_argument("--pg", nargs="?", const=PG, metavar="URL",
                    help="also replay into a fresh schema of this PostgreSQL database "
                         f"(default {PG})")
    a = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=a.workdir) as d:
        r = measure(Path(d), a.beds, a.seconds, a.repeats)
        if a.pg:
            r["postgresql"] = measure_pg(Path(d), a.beds, a.seconds, a.pg)
    text = json.dumps(r, indent=2)
    print(text)
    if a.out:
        Path(a.out).write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
