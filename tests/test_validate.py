"""`hemostream validate` on a tiny cohort (the full one runs in the benchmark suite): the
command prints the table, writes JSON and HTML, and its figures follow from the replays."""

from __future__ import annotations

import json
import subprocess
import sys

from hemostream.app.validate import RuleFigures, evaluate
from hemostream.review.periods import AlarmPeriod
from hemostream.review.queries import BedInfo


def test_evaluate_counts_detections_delays_and_false_alarms():
    beds = {1: BedInfo(1, "SDU9", "bed-01", 0.0, 43200.0),
            2: BedInfo(2, "SDU9", "bed-02", 0.0, 43200.0)}
    onsets = {1: 1000.0, 2: 1000.0}
    periods = [AlarmPeriod("a", 1, "right_heart_mismatch", "physiological", 1300.0),
               AlarmPeriod("b", 2, "right_heart_mismatch", "physiological", 500.0),  # before
               AlarmPeriod("c", 2, "low_output", "physiological", 2000.0)]
    figs: dict[str, RuleFigures] = {}
    days = evaluate("rv_failure", beds, periods, onsets, figs)
    assert days == 1.0                                   # two beds of 12 h
    f = figs["right_heart_mismatch"].as_dict(days)
    assert (f["targeted"], f["detected"], f["delays_s"]) == (2, 1, [300.0])
    assert f["burden_per_bed_day"] == 2.0
    figs2: dict[str, RuleFigures] = {}
    evaluate("stable", beds, periods, onsets, figs2)     # on a stable bed every raise is false
    assert figs2["low_output"].false_raises == 1


def test_validate_command_on_a_tiny_cohort(tmp_path):
    r = subprocess.run([sys.executable, "-m", "hemostream.cli", "validate", "--per-scenario",
                        "1", "--scenarios", "stable,rv_failure", "--json",
                        str(tmp_path / "v.json"), "--html", str(tmp_path / "v.html")],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    assert "right_heart_mismatch" in r.stdout and "not a medical device" in r.stdout
    got = json.loads((tmp_path / "v.json").read_text())
    rhm = next(x for x in got["rules"] if x["rule"] == "right_heart_mismatch")
    assert rhm["targeted"] == 1
    assert "<svg" in (tmp_path / "v.html").read_text() or rhm["detected"] == 0
    bad = subprocess.run([sys.executable, "-m", "hemostream.cli", "validate", "--scenarios",
                          "nosuch"], capture_output=True, text=True, timeout=60)
    assert bad.returncode == 2 and "nosuch" in bad.stderr
