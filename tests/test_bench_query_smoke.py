"""Smoke run of benchmarks/query_month.py --smoke (2 beds x 2 days): it works end to end.

It checks the JSON's shape and sanity (every time positive, the query's rows one bed's heart
rate at 1 Hz over about a day), never a time against the target: the benchmark judges the
speed, in its own run against its own baseline.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

pytestmark = pytest.mark.slow


def test_query_month_smoke(tmp_path):
    out = tmp_path / "q.json"
    r = subprocess.run([sys.executable, "-m", "benchmarks.query_month", "--smoke", "--out",
                        str(out), "--workdir", str(tmp_path)], cwd=ROOT, capture_output=True,
                       text=True, timeout=600)
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-4000:]
    res = json.loads(out.read_text())
    assert res["database"]["beds"] == 2 and res["database"]["days"] == 2
    q, h = res["query"], res["baseline_help"]
    for f in (q, h):
        assert len(f["wall_s"]) == 2 and all(math.isfinite(x) and x > 0 for x in f["wall_s"])
        assert 0 < f["best_s"] <= f["median_s"] and f["cpu_best_s"] > 0
    # 24 h of a 1 Hz heart rate is 86,400 values (the copies' quarter hours overlap a little)
    assert 0.9 * 86_400 <= q["rows"] <= 1.2 * 86_400
    assert res["target_s"] == 1.0 and isinstance(res["pass"], bool)
    assert res["ratio_best"] > 0 and res["load_average"]["before"]
    assert "query: best" in r.stderr
