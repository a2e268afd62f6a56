"""``hemostream query`` output: the batched observation text (``query.output``) is the
general path's (``query.write`` of ``query.rows``) byte for byte, and it carries what the
store holds; times are the standard library's RFC 3339 text; every subcommand's help still
works; a query and ``--help`` load only what they use (no timing here: the speed is
benchmarks/query_month.py's)."""

from __future__ import annotations

import argparse
import csv
import io
import json
import math
import random
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from sqlalchemy import select

from hemostream import CAUTION, query
from hemostream.app.cli import build_parser, main
from hemostream.core.timetext import format_epochs
from hemostream.replay import replay_file
from hemostream.store import TABLES, iter_observations, open_engine

ROOT = Path(__file__).resolve().parent.parent
DATA = Path(__file__).resolve().parent / "data"


def stdlib_text(t: float) -> str:
    """RFC 3339 UTC text with milliseconds, from the standard library's datetime alone."""
    return datetime.fromtimestamp(t, timezone.utc).isoformat(
        timespec="milliseconds").replace("+00:00", "Z")


def _odd_times(path: Path) -> None:
    """One bed, 40 messages at odd milliseconds, a value converted from kPa (raw kept), a
    questionable one and an artifact-prone series: rows whose text differs in every field."""
    t0 = datetime(2026, 12, 3, 7, 59, 59, 998000, tzinfo=timezone.utc)
    with path.open("w") as f:
        for k in range(40):
            t = t0 + timedelta(milliseconds=k * 1001 + (k % 7))
            ts = t.isoformat(timespec="milliseconds").replace("+00:00", "Z")
            obs = [{"param": "HR", "value": 70 + k % 5, "unit": "/min"},
                   {"param": "CVP", "value": 0.8 + k / 100, "unit": "kPa"},
                   {"param": "SPO2", "value": 97.5, "unit": "%",
                    **({"status": "questionable"} if k % 9 == 0 else {})}]
            f.write(json.dumps({"rx": ts, "topic": "hemo/QW1/bed-q1/obs", "payload": {"v": 1, "device": "gw-q", "seq": k + 1,
                                            "time": ts, "obs": obs}}) + "\n")


@pytest.fixture(scope="module")
def ward(tmp_path_factory) -> str:
    d = tmp_path_factory.mktemp("query")
    url = f"sqlite:///{d / 'ward.db'}"
    _odd_times(d / "odd.jsonl")
    for rec in (DATA / "handmade.jsonl", DATA / "compare-bed.jsonl", d / "odd.jsonl"):
        replay_file(rec, url)
    return url


FILTERS = [dict(), dict(bed="bed-A1"), dict(bed="QW1/bed-q1", param="CVP"), dict(param="HR"),
           dict(limit=7), dict(param="SPO2", quality=["questionable"]), dict(bed="nobody"),
           dict(since=1796457600.5)]


@pytest.mark.parametrize("batch", [query.BATCH, 5])
@pytest.mark.parametrize("fmt", ["jsonl", "csv"])
def test_batched_text_is_the_general_paths(ward, fmt, batch, monkeypatch):
    monkeypatch.setattr(query, "BATCH", batch)
    engine = open_engine(ward, create=False)
    seen = 0
    for f in FILTERS:
        args = (engine, "observations", f.get("bed"), f.get("param"), f.get("since"),
                f.get("limit"), f.get("quality"))
        fast, general = io.StringIO(), io.StringIO()
        n = query.output(*args, fmt=fmt, stream=fast)
        m = query.write(query.rows(*args), fmt, general)
        assert (n, fast.getvalue()) == (m, general.getvalue()), f
        seen += n
    assert seen > 1000


def test_rows_carry_what_the_store_holds(ward):
    engine = open_engine(ward, create=False)
    out = io.StringIO()
    query.output(engine, "observations", fmt="jsonl", stream=out)
    got = [json.loads(line) for line in out.getvalue().splitlines()]
    with engine.connect() as conn:
        beds = {r.id: (r.unit, r.bed) for r in conn.execute(select(TABLES["beds"]))}
        held = list(iter_observations(conn))
    assert len(got) == len(held) > 1000
    for g, (t, _mid, b, p, v, u, st, rv, ru, late, q) in zip(got, held):
        assert g == {"time": stdlib_text(t), "care_unit": beds[b][0], "bed": beds[b][1],
                     "param": p, "value": v, "unit": u, "status": st, "raw_value": rv,
                     "raw_unit": ru, "late": late, "quality": q}
    # the kPa values went in converted (1 kPa = 7.50062 mmHg, from memory: 760 mmHg =
    # 101.325 kPa) with the raw value kept
    cvp = [g for g in got if g["param"] == "CVP" and g["bed"] == "bed-q1"]
    assert len(cvp) == 40
    assert all(g["raw_unit"] == "kPa" and g["unit"] == "mm[Hg]"
               and math.isclose(g["value"], g["raw_value"] * 760 / 101.325, rel_tol=1e-6)
               for g in cvp)
    ms = {g["time"][-5:] for g in cvp}                      # odd milliseconds
    assert ".998Z" in ms and len(ms) >= 10


def test_csv_rows_read_back(ward):
    engine = open_engine(ward, create=False)
    out = io.StringIO()
    query.output(engine, "observations", bed="QW1/bed-q1", fmt="csv", stream=out)
    rows = list(csv.DictReader(io.StringIO(out.getvalue())))
    assert len(rows) == 120 and list(rows[0]) == list(query.OBS_FIELDS)
    assert rows[0]["time"] == "2026-12-03T07:59:59.998Z" and rows[0]["late"] == "False"


def test_time_text_is_the_standard_librarys():
    rnd = random.Random(11)
    times = [rnd.uniform(-2e9, 4e9) for _ in range(20_000)]
    base = 1796112000.0
    times += [base + k / 1000 + d for k in range(1000) for d in (0.0, 5e-7, -5e-7, 4.999e-4,
                                                                 5e-4, 9.995e-4)]
    times += [k * 0.0005 for k in range(-2000, 2000)] + [0.0, -0.0, 1.0, -1.0]
    assert format_epochs(times) == [stdlib_text(t) for t in times]
    assert format_epochs(times[:50], suffix="") == [stdlib_text(t)[:-1] for t in times[:50]]
    with pytest.raises(ValueError):
        format_epochs([float("nan")])


def test_the_command_writes_the_same_bytes(ward):
    engine = open_engine(ward, create=False)
    for fmt in ("jsonl", "csv"):
        general = io.StringIO()
        query.write(query.rows(engine, "observations", param="HR"), fmt, general)
        r = subprocess.run([sys.executable, "-m", "hemostream.cli", "query", "observations",
                            "--db", ward, "--param", "HR", "--format", fmt], cwd=ROOT,
                           capture_output=True, timeout=120)     # bytes: csv ends in \r\n
        assert r.returncode == 0, r.stderr
        assert r.stdout.decode() == general.getvalue() and r.stdout
        assert r.stderr.decode() == f"CAUTION: {CAUTION}\n"


def _parsers(p: argparse.ArgumentParser, path: tuple[str, ...] = ()):
    yield path, p
    for a in p._actions:
        if isinstance(a, argparse._SubParsersAction):
            for name, sub in a.choices.items():
                yield from _parsers(sub, path + (name,))


def test_every_subcommand_has_its_help(capsys):
    paths = list(_parsers(build_parser()))
    names = {p[0] for p, _ in paths if p}
    assert {"replay", "query", "check-config", "run", "ack", "demo", "watch", "compare",
            "report", "db", "status", "simulate", "validate"} <= names
    for path, parser in paths:
        with pytest.raises(SystemExit) as e:
            main([*path, "--help"])
        assert e.value.code == 0, path
        text = capsys.readouterr().out
        assert text.startswith("usage: hemostream"), path
        words = " ".join((parser.description or "").split()[:6])
        assert words in " ".join(text.split()), path


def test_query_help_as_a_process():
    r = subprocess.run([sys.executable, "-m", "hemostream.cli", "query", "--help"], cwd=ROOT,
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert "{observations,derived,rejected,notes,alarms,admissions,commands,configs}" in r.stdout
    assert "--quality" in r.stdout and "--format {table,jsonl,csv}" in r.stdout


#: modules a jsonl query or --help has no use for (the live service, the configuration and
#: rules models, rich, HL7, the simulators' model, the writer)
UNUSED = ("rich", "pydantic", "hemostream.core.config", "hemostream.core.processor",
          "hemostream.store.writer", "hemostream.live.service", "hemostream.live.mqtt",
          "hemostream.intake.hl7.cli", "hemostream.replay", "hemostream.app.demo",
          "hemostream.dashboard", "simulators.model", "simulators.scenario", "alembic")


@pytest.mark.parametrize("argv", [["--help"], ["query", "observations", "--format", "jsonl",
                                               "--param", "HR", "--since",
                                               "2026-12-01T00:00:00Z", "--db"]])
def test_a_command_loads_only_what_it_uses(ward, argv):
    argv = argv + [ward] if argv[-1] == "--db" else argv
    code = ("import sys\nfrom hemostream.app.cli import main\ntry:\n"
            f"    main({argv!r})\nexcept SystemExit:\n    pass\n"
            f"print(sorted(m for m in {UNUSED!r} if m in sys.modules), file=sys.stderr)")
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stderr.splitlines()[-1] == "[]"


def test_a_bad_config_is_reported_even_with_db(ward, tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("not toml [\n")
    with pytest.raises(SystemExit) as e:
        main(["query", "observations", "--db", ward, "--config", str(bad), "--limit", "1"])
    assert e.value.code == 2
    assert "invalid configuration" in capsys.readouterr().err
