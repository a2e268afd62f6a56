"""Smoke run of the benchmark harness (benchmarks/run.py --smoke): it works end to end.

The harness measures hemostream's performance figures as ratios against baselines taken in
the same run (docs/performance.md). This test runs its smallest size (20 beds x 20 s for the
replay, a 20-bed broker stream, a 6-second latency stream, two small scale runs) against a
real Mosquitto and checks that the JSON carries the four figures with sane values: every
rate, cost and ratio positive, nothing lost, alarms seen. It asserts no absolute time and no
target - speed is judged by the benchmark itself, never by a unit test.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

from mosquitto import require_broker

ROOT = Path(__file__).resolve().parent.parent

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def _positive(x) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x) and x > 0


@pytest.fixture(scope="module")
def results(tmp_path_factory) -> dict:
    require_broker()
    d = tmp_path_factory.mktemp("bench")
    out = d / "results.json"
    r = subprocess.run([sys.executable, "-m", "benchmarks.run", "--smoke", "--out", str(out),
                        "--workdir", str(d)], cwd=ROOT, capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-4000:]
    return json.loads(out.read_text())


def test_the_four_figures_and_the_machine(results):
    assert set(results["figures"]) == {"replay", "broker", "latency", "scale"}
    for name, f in results["figures"].items():
        assert "error" not in f, f"{name}: {f.get('error')}"
    m = results["machine"]
    assert m["cpu"] and m["cores"] >= 1 and m["python"] and m["platform"]
    assert results["load_average"]["start"]
    # the printed table: one row per figure, the scale figure's three
    assert [r["figure"][:2] for r in results["table"]] == ["1.", "2.", "3.", "4a", "4b", "4c", "4d", "4e"]
    assert "| figure |" in results["markdown"]


def test_replay_figure_is_sane(results):
    f = results["figures"]["replay"]
    assert _positive(f["measured"]) and _positive(f["baseline"]) and _positive(f["ratio"])
    d = f["details"]
    assert d["lines"] == 20 + 20 * 20                      # one admit per bed, then 1 Hz
    assert d["observations"] == 20 * 20 * 10               # every observation stored
    assert d["rejected"] == 0
    # derived values are computed for every message but stored at a cadence or on change
    assert 0 < d["derived_stored"] <= d["derived_computed"]


def test_broker_figure_counts_every_message_once(results):
    f = results["figures"]["broker"]
    assert _positive(f["measured"]) and _positive(f["baseline"]) and _positive(f["ratio"])
    assert f["lost"] == 0
    for run in f["details"]["service_runs"]:
        assert run["lost"] == 0 and run["stored_twice"] == 0 and run["rejected"] == 0
        assert run["stored"] == run["expected"] == 20 * 20
        assert run["exit_code"] == 0                        # SIGTERM stops it cleanly
    for run in f["details"]["bare_runs"]:
        assert run["count"] == 20 + 20 * 20


def test_latency_figure_sees_alarms(results):
    f = results["figures"]["latency"]
    d = f["details"]
    assert f["lost"] == 0 and d["stored"] == d["expected"]
    assert d["raised_events"] > 0 and "raised" in d["transitions"]
    assert d["raised_events"] == d["raised_at_the_completing_sample"] + d["raised_later"]
    # measured from the publish of the message that completed the condition delay, which
    # exists before the alarm can: every latency is positive
    assert d["min_ms"] > 0 and d["p50_ms"] <= d["p99_ms"] <= d["max_ms"]
    assert d["transport_samples"] > 0 and _positive(d["transport_p99_ms"])


def test_scale_figure_is_sane(results):
    f = results["figures"]["scale"]
    runs = f["details"]["runs"]
    assert [r["beds"] for r in runs] == [10, 20]
    for r in runs + [f["details"]["short_window_run"], f["details"]["stored_fill_run"]]:
        assert _positive(r["us_per_message"]) and _positive(r["peak_rss_mb"])
        assert r["rejected"] == 0 and r["measured_lines"] >= 2000
    for row in f["rows"][:2]:
        assert _positive(row["ratio"])
