"""The `hemostream` command as a user runs it (a real subprocess, real files)."""

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "simulators" / "recordings" / "example-ward.jsonl"


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "hemostream.cli", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def test_replay_example_then_query_jsonl(tmp_path):
    db = f"sqlite:///{tmp_path/'w.db'}"
    r = run("replay", str(EXAMPLE), "--db", db)
    assert r.returncode == 0, r.stderr
    assert "rejected 5" in r.stdout and "bad_unit: 1" in r.stdout
    r = run("query", "derived", "--db", db, "--bed", "SDU4/bed-01", "--param", "SVR",
            "--format", "jsonl")
    assert r.returncode == 0, r.stderr
    rows = [json.loads(x) for x in r.stdout.splitlines()]
    assert rows and all({"time", "bed", "param", "value", "unit"} <= set(x) for x in rows)
    assert all(x["param"] == "SVR" and x["unit"] == "dyn.s/cm5" for x in rows)
    r = run("query", "rejected", "--db", db, "--format", "jsonl")
    rows = [json.loads(x) for x in r.stdout.splitlines()]
    assert len(rows) == 5 and all({"rx", "topic", "reason"} <= set(x) for x in rows)
    r = run("query", "observations", "--db", db, "--param", "CVP", "--limit", "3",
            "--format", "csv")
    assert r.stdout.splitlines()[0].startswith("time,care_unit,bed,param,value,unit")
    assert len(r.stdout.splitlines()) == 4


def test_replay_missing_file_is_an_error(tmp_path):
    r = run("replay", str(tmp_path / "nope.jsonl"), "--db", f"sqlite:///{tmp_path/'x.db'}")
    assert r.returncode != 0 and "does not exist" in r.stderr


def test_replay_unusable_database_is_an_error(tmp_path):
    r = run("replay", str(EXAMPLE), "--db", f"sqlite:///{tmp_path}/missing/dir/x.db")
    assert r.returncode == 1 and "cannot open database" in r.stderr


def test_query_missing_database_is_an_error(tmp_path):
    r = run("query", "derived", "--db", f"sqlite:///{tmp_path/'none.db'}")
    assert r.returncode == 1 and "does not exist" in r.stderr


def test_check_config_reports_file_key_and_expectation(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('[ingest]\nmax_clock_skew_s = "soon"\nlate_after = 3\n'
                   '[derive]\nbsa_formula = "haycock"\n')
    r = run("check-config", str(bad))
    assert r.returncode == 1
    assert f"{bad}: ingest.max_clock_skew_s: Input should be a valid number" in r.stdout
    assert f"{bad}: ingest.late_after: unknown key" in r.stdout
    assert "derive.bsa_formula: Input should be 'mosteller' or 'dubois'" in r.stdout
    r = run("check-config", str(ROOT / "configs" / "default.toml"))
    assert r.returncode == 0, r.stdout


def test_help_explains():
    r = run("--help")
    assert r.returncode == 0 and "not a medical device" in r.stdout
    r = run("replay", "--help")
    assert "--speed" in r.stdout and "--db" in r.stdout
