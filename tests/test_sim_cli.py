"""The ``simulate`` subcommand (run through its own parser, as ``hemostream`` wires it)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from simulators.cli import main


def test_list_prints_every_scenario_with_a_description(capsys) -> None:
    assert main(["simulate", "--list"]) == 0
    out = capsys.readouterr().out.splitlines()
    ids = [line.split()[0] for line in out]
    assert {"stable", "hemorrhage", "bolus_responder", "bolus_nonresponder", "rv_failure",
            "lv_failure", "vasodilation", "exercise", "demo"} <= set(ids)
    assert all(len(line.split(None, 1)) == 2 for line in out)


def test_simulate_writes_a_recording(tmp_path: Path, capsys) -> None:
    out = tmp_path / "ward.jsonl"
    rc = main(["simulate", "--scenario", "hemorrhage", "--beds", "2", "--duration", "1m30s",
               "--seed", "7", "--out", str(out)])
    assert rc == 0
    lines = out.read_text().splitlines()
    assert len(lines) == 2 + 2 * 90
    assert json.loads(lines[0])["topic"].endswith("/admit")
    assert "2 bed(s)" in capsys.readouterr().err


def test_a_scenario_file_by_path_and_standard_output(tmp_path: Path, capsys) -> None:
    f = tmp_path / "mine.toml"
    f.write_text('id = "mine"\ntitle = "Mine"\ndescription = "one bed"\nunit = "ICU3"\n'
                 '[[beds]]\nid = "b7"\n')
    assert main(["simulate", "--scenario", str(f), "--duration", "3s", "--out", "-"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert [json.loads(x)["topic"] for x in lines[:2]] == ["hemo/ICU3/b7/admit",
                                                          "hemo/ICU3/b7/obs"]


@pytest.mark.parametrize("argv, message", [
    (["simulate", "--scenario", "nope", "--out", "x.jsonl"], "no scenario named 'nope'"),
    (["simulate", "--out", "x.jsonl"], "--scenario"),
    (["simulate", "--scenario", "stable"], "--out"),
    (["simulate", "--scenario", "stable", "--publish", "mqtt://localhost:1883"], "not available"),
])
def test_usage_errors_exit_2_with_a_reason(argv, message, capsys) -> None:
    assert main(argv) == 2
    assert message in capsys.readouterr().err


def test_bad_duration_is_rejected_by_the_parser(capsys) -> None:
    with pytest.raises(SystemExit) as e:
        main(["simulate", "--scenario", "stable", "--duration", "2x", "--out", "-"])
    assert e.value.code == 2
    assert "90s, 30m, 2h or 1h30m" in capsys.readouterr().err


def test_publish_goes_through_the_publisher_the_cli_wires_in(tmp_path: Path) -> None:
    import argparse

    from simulators.cli import add_parser

    got = {}

    def publisher(lines, url, speed):
        got["lines"] = list(lines)
        got["url"], got["speed"] = url, speed
        return 0

    parser = argparse.ArgumentParser(prog="hemostream")
    add_parser(parser.add_subparsers(dest="command"), publisher=publisher)
    out = tmp_path / "tee.jsonl"
    args = parser.parse_args(["simulate", "--scenario", "stable", "--duration", "5s",
                              "--publish", "mqtt://127.0.0.1:1883", "--speed", "10",
                              "--out", str(out), "--quiet"])
    assert args.func(args) == 0
    assert got["url"] == "mqtt://127.0.0.1:1883" and got["speed"] == 10.0
    assert len(got["lines"]) == 6
    assert [json.loads(x) for x in out.read_text().splitlines()] == got["lines"]
