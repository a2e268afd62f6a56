"""The 24-hour query on the 30-day database, whole process, against the command's own start.

    python -m benchmarks.query_month                        # 24 beds x 30 days (~3.2 GB)
    python -m benchmarks.query_month --db /tmp/q/month.db   # keep (or reuse) the database
    python -m benchmarks.query_month --smoke                # 2 beds x 2 days, for the test

The database is made as :mod:`benchmarks.month_db` makes it (a real sealed chunk copied to
every bed's every quarter hour; the queried bed's last day exact, so the query returns real,
ordered rows). Then, alternating, ``--repeats`` times each:

- the figure: ``hemostream query observations --bed LOAD/bed-0000 --param HR --since
  (end - 24 h) --format jsonl`` (one bed's heart rate over 24 hours), stdout to a file;
- the baseline: ``hemostream --help``, the same command's import and parser with no work:
  what any subcommand costs before it starts.

Both are whole processes (spawn to exit, :func:`benchmarks.machine.run_measured`), best and
median of the repeats, with the load average before and after (2 shared cores: the figures
move with the load; the ratio moves less). Target: the query under 1 s.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
from datetime import timedelta
from pathlib import Path

from . import make_load, month_db
from .machine import PY, load_average, machine, run_measured, source_version

TARGET_S = 1.0
BED, PARAM = "LOAD/bed-0000", "HR"


def make_db(db: Path, work: Path, beds: int, days: int) -> dict:
    """The database at ``db`` (made as benchmarks.month_db makes it); what it holds."""
    tpl = month_db.template(work)
    end = make_load.START.timestamp() - 120.0
    return month_db.build(db, tpl, beds, days, end)


def query_args(db: Path) -> list[str]:
    since = make_load._t(make_load.START - timedelta(seconds=120 + 86400))
    return [PY, "-m", "hemostream.cli", "query", "observations", "--db", f"sqlite:///{db}",
            "--bed", BED, "--param", PARAM, "--since", since, "--format", "jsonl"]


def _summary(runs: list) -> dict:
    wall = [m.seconds for m in runs]
    return {"best_s": round(min(wall), 3), "median_s": round(statistics.median(wall), 3),
            "wall_s": [round(x, 3) for x in wall],
            "cpu_s": [round(m.user_s + m.sys_s, 3) for m in runs],
            "cpu_best_s": round(min(m.user_s + m.sys_s for m in runs), 3),
            "max_rss_kb": max(m.max_rss_kb for m in runs)}


def measure(db: Path, repeats: int) -> dict:
    help_args = [PY, "-m", "hemostream.cli", "--help"]
    run_measured(help_args).check()                   # warm the page cache and .pyc files
    run_measured(query_args(db)).check()
    before = load_average()
    q, h = [], []
    for _ in range(repeats):
        q.append(run_measured(query_args(db)).check())
        h.append(run_measured(help_args).check())
    after = load_average()
    rows = q[0].stdout.count("\n")
    if any(m.stdout != q[0].stdout for m in q):
        raise RuntimeError("the query gave different output from one run to the next")
    query, baseline = _summary(q), _summary(h)
    return {"query": {**query, "rows": rows, "command": " ".join(query_args(db)[1:])},
            "baseline_help": baseline,
            "ratio_best": round(query["best_s"] / baseline["best_s"], 2),
            "work_s": round(query["best_s"] - baseline["best_s"], 3),
            "target_s": TARGET_S, "pass": query["best_s"] < TARGET_S,
            "load_average": {"before": before, "after": after}}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--beds", type=int, default=24)
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--db", metavar="PATH", help="the database: made there when missing, "
                    "reused when present (default: a temporary one, removed after)")
    ap.add_argument("--smoke", action="store_true", help="2 beds x 2 days, 2 repeats")
    ap.add_argument("--out", metavar="FILE", help="also write the JSON here")
    ap.add_argument("--workdir", metavar="DIR")
    a = ap.parse_args(argv)
    if a.smoke:
        a.beds, a.days, a.repeats = 2, 2, 2
    with tempfile.TemporaryDirectory(dir=a.workdir) as d:
        work = Path(d)
        db = Path(a.db) if a.db else work / "month.db"
        held = make_db(db, work, a.beds, a.days) if not db.exists() else {"reused": str(db)}
        r = {"figure": "query one bed's parameter over 24 h on the 30-day database "
                       "(whole process)",
             "database": {**held, "beds": a.beds, "days": a.days,
                          "file_bytes": db.stat().st_size},
             **measure(db, a.repeats), "machine": machine(), "source": source_version()}
    text = json.dumps(r, indent=2)
    print(text)
    if a.out:
        Path(a.out).write_text(text + "\n")
    q = r["query"]
    print(f"query: best {q['best_s']:.3f} s (median {q['median_s']:.3f}), {q['rows']} rows; "
          f"CPU {q['cpu_best_s']:.3f} s; hemostream --help: best "
          f"{r['baseline_help']['best_s']:.3f} s, CPU {r['baseline_help']['cpu_best_s']:.3f} s; "
          f"target < "
          f"{TARGET_S:g} s: {'met' if r['pass'] else 'not met'}; load average "
          f"{r['load_average']['before']} -> {r['load_average']['after']}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
