"""Recordings from the simulators: wire format, arrival order, determinism, artifacts,
notes, scenario files, and a clean replay through the processing core."""

from __future__ import annotations

import itertools
import json
import textwrap
from collections import Counter, defaultdict
from datetime import datetime
from pathlib import Path

import pytest

from hemostream.core.units import UNITS, to_canonical
from hemostream.core.wire import PARAMS, PAYLOAD_MODELS, RecordingLine, parse_topic
from simulators import (SCENARIO_IDS, ScenarioError, generate, list_scenarios, load_scenario,
                        parse_duration, write_recording)


def _t(s: str) -> float:
    return datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp()


def _write(tmp_path: Path, text: str, name: str = "ward.toml") -> Path:
    p = tmp_path / name
    p.write_text(textwrap.dedent(text), encoding="utf-8")
    return p


ARTIFACT_WARD = """
    id = "artifact_ward"
    title = "Artifacts on purpose"
    description = "Every artifact at a known time"
    unit = "TEST1"
    duration = "20m"

    [defaults]
    artifacts = { random = false }
    monitoring = { nibp_every = "0s", pawp_every = "0s", co_every = "0s" }

    [[beds]]
    id = "bed-01"
    monitoring = { pa_catheter = true, units = { CVP = "cm[H2O]" } }
    events = [
      { at = "2m", do = "flush", channel = "ABP", for = "4s" },
      { at = "3m", do = "zeroing", channel = "CVP", for = "15s" },
      { at = "4m", do = "transducer_move", channel = "CVP", offset_cm = 10, for = "3m" },
      { at = "8m", do = "dropout", params = ["SPO2"], for = "30s" },
      { at = "10m", do = "silence", for = "2m", reboot = true },
      { at = "13m", do = "sample_draw", for = "25s" },
      { at = "15m", do = "wedge" },
      { at = "16m", do = "nibp" },
    ]

    [[beds]]
    id = "bed-02"
    monitoring = { co = "thermodilution", units = { pressure = "kPa" } }
    events = [ { at = "1m", do = "measure_co" } ]
"""


# --------------------------------------------------------------------------- wire format


def test_every_line_is_valid_wire_format_in_arrival_order() -> None:
    lines = list(generate("demo", duration_s=1260, seed=5))
    kinds = Counter()
    last_rx = float("-inf")
    seqs: dict[str, list[int]] = defaultdict(list)
    for line in lines:
        RecordingLine.model_validate(line)
        topic = parse_topic(line["topic"])
        assert topic.unit == "SDU2"
        kinds[topic.kind] += 1
        msg = PAYLOAD_MODELS[topic.kind].model_validate(line["payload"])
        rx = _t(line["rx"])
        assert rx >= last_rx, "lines must be in arrival order"
        last_rx = rx
        delay_ms = round((rx - _t(line["payload"]["time"])) * 1000)
        if topic.kind == "obs":
            assert 20 <= delay_ms <= 80, delay_ms
            seqs[msg.device].append(msg.seq)
            for o in msg.obs:
                assert o.param in PARAMS
                assert UNITS[o.unit].dimension == PARAMS[o.param].dimension
    assert kinds["admit"] == 6 and kinds["obs"] >= 6 * 1200 and kinds["note"] >= 1
    for device, seq in seqs.items():
        # per-device counter (a rebooted gateway would start again from 0)
        assert all(b == a + 1 or b == 0 for a, b in itertools.pairwise(seq)), device


def test_a_bed_admits_first_then_reports_every_second() -> None:
    lines = list(generate("stable", duration_s=120, seed=2))
    assert parse_topic(lines[0]["topic"]).kind == "admit"
    admit = lines[0]["payload"]
    assert 140 <= admit["height_cm"] <= 200 and 40 <= admit["weight_kg"] <= 160
    obs = [ln for ln in lines if ln["topic"].endswith("/obs")]
    times = [_t(ln["payload"]["time"]) for ln in obs]
    assert all(b - a == pytest.approx(1.0) for a, b in itertools.pairwise(times))
    params = {o["param"] for o in obs[0]["payload"]["obs"]}
    assert {"HR", "ABP_SYS", "ABP_DIA", "ABP_MEAN", "CVP", "CO", "SV", "SPO2", "RR"} <= params


def test_lines_are_compact_deterministic_json(tmp_path: Path) -> None:
    path = tmp_path / "r.jsonl"
    n = write_recording(generate("stable", duration_s=5, seed=1), path)
    text = path.read_text()
    assert n == len(text.splitlines()) == 6
    first = text.splitlines()[0]
    assert ", " not in first and ": " not in first
    assert json.loads(first)["topic"] == "hemo/SDU2/bed-01/admit"


# --------------------------------------------------------------------------- determinism


def test_same_seed_same_recording_byte_for_byte(tmp_path: Path) -> None:
    a, b, c = tmp_path / "a.jsonl", tmp_path / "b.jsonl", tmp_path / "c.jsonl"
    write_recording(generate("demo", duration_s=600, seed=11), a)
    write_recording(generate("demo", duration_s=600, seed=11), b)
    write_recording(generate("demo", duration_s=600, seed=12), c)
    assert a.read_bytes() == b.read_bytes()
    assert a.read_bytes() != c.read_bytes()


def test_a_bed_does_not_change_when_beds_are_added() -> None:
    def bed1(n: int) -> list[dict]:
        return [ln for ln in generate("hemorrhage", beds=n, duration_s=300, seed=4)
                if "/bed-01/" in ln["topic"]]

    assert bed1(1) == bed1(3)


def test_generate_is_lazy() -> None:
    # an 8-hour, 24-bed ward starts streaming at once (memory bounded, not built up front)
    gen = generate("demo", beds=24, duration_s=8 * 3600, seed=0)
    first = list(itertools.islice(gen, 200))
    assert len(first) == 200
    gen.close()


# --------------------------------------------------------------------------- artifacts


def test_deliberate_artifacts_look_as_they_should(tmp_path: Path) -> None:
    lines = list(generate(_write(tmp_path, ARTIFACT_WARD), seed=3))
    start = _t("2026-12-01T08:00:00Z")
    by_bed: dict[str, list[tuple[float, dict]]] = defaultdict(list)
    notes = []
    for ln in lines:
        bed, kind = ln["topic"].split("/")[2:]
        if kind == "obs":
            by_bed[bed].append((_t(ln["payload"]["time"]) - start, ln["payload"]))
        elif kind == "note":
            notes.append((bed, round(_t(ln["payload"]["time"]) - start), ln["payload"]))

    def values(bed: str, param: str, t0: float, t1: float) -> list[tuple[float, dict]]:
        return [(t, o) for t, msg in by_bed[bed] for o in msg["obs"]
                if o["param"] == param and t0 <= t < t1]

    # flush: the arterial pressure jumps towards the 300 mm[Hg] flush bag, with a note
    flush = [to_canonical(o["value"], o["unit"]) for _, o in values("bed-01", "ABP_MEAN", 120, 124)]
    assert len(flush) == 4 and min(flush) > 250
    assert ("bed-01", 120, {"v": 1, "time": "2026-12-01T08:02:00.000Z", "kind": "line_flush",
                            "param": "ABP_MEAN", "duration_s": 4}) in notes
    # zeroing: CVP near 0 with status calibrating, with a note
    zero = values("bed-01", "CVP", 180, 195)
    assert len(zero) == 15 and all(o.get("status") == "calibrating" for _, o in zero)
    assert all(abs(to_canonical(o["value"], o["unit"])) <= 2 for _, o in zero)
    assert any(n[2]["kind"] == "zeroing" and n[2]["param"] == "CVP" for n in notes)
    # CVP in cm[H2O] from this gateway; a transducer 10 cm low reads about 7 mm[Hg] high
    cvp = lambda t0, t1: [to_canonical(o["value"], o["unit"]) for _, o in values("bed-01", "CVP", t0, t1)]
    assert {o["unit"] for _, o in values("bed-01", "CVP", 0, 60)} == {"cm[H2O]"}
    moved, before = sum(cvp(250, 410)) / 160, sum(cvp(60, 170)) / 110
    assert 5.5 < moved - before < 9.0
    assert any(n[2]["kind"] == "reposition" and n[1] == 420 for n in notes)
    # dropout: no SPO2 for 30 s, the rest of the message still there
    assert values("bed-01", "SPO2", 480, 510) == []
    assert len(values("bed-01", "HR", 480, 510)) == 30
    # silence: nothing for 2 minutes, then seq starts again from 0
    assert [t for t, _ in by_bed["bed-01"] if 600 <= t < 720] == []
    after = [msg for t, msg in by_bed["bed-01"] if t >= 720]
    assert after[0]["seq"] == 0
    # a blood sample from the arterial line: a flat low trace, then the flush, with a note
    draw = [to_canonical(o["value"], o["unit"]) for _, o in values("bed-01", "ABP_MEAN", 780, 800)]
    assert max(draw) < 20
    assert any(n[2]["kind"] == "sample_draw" for n in notes)
    # wedge: PAWP with its own (earlier) time, the PA trace reads wedge meanwhile
    pawp = values("bed-01", "PAWP", 900, 960)
    assert len(pawp) == 1 and _t(pawp[0][1]["time"]) - start == pytest.approx(906, abs=1)
    # cuff pressure on demand
    assert len(values("bed-01", "NIBP_MEAN", 960, 1000)) == 1
    # thermodilution: one CO with SV from three injections, timed at the middle one,
    # pressures in kPa from bed-02's gateway
    td = values("bed-02", "CO", 0, 1200)
    assert len(td) == 1 and "time" in td[0][1]
    assert {o["unit"] for _, o in values("bed-02", "ABP_MEAN", 0, 60)} == {"kPa"}


def test_scenario_notes_mark_interventions_and_deterioration() -> None:
    notes = [ln["payload"] for ln in generate("hemorrhage", duration_s=5400, seed=1)
             if ln["topic"].endswith("/note")]
    onset = [n for n in notes if n["kind"] == "deterioration_onset"]
    assert len(onset) == 1 and onset[0]["time"] == "2026-12-01T08:20:00.000Z"
    assert "text" in onset[0]
    boluses = [n for n in notes if n["kind"] == "fluid_bolus"]
    assert [(b["volume_ml"], b["over_min"]) for b in boluses] == [(1000, 20), (600, 30)]


# --------------------------------------------------------------------------- scenario files


def test_the_issue_scenarios_are_shipped() -> None:
    ids = {s.id for s in list_scenarios()}
    assert set(SCENARIO_IDS) | {"demo"} <= ids
    for info in list_scenarios():
        assert info.description and len(info.description) <= 200
        assert load_scenario(info.id).id == info.id


@pytest.mark.parametrize("name", SCENARIO_IDS)
def test_every_scenario_runs(name: str) -> None:
    lines = list(generate(name, beds=2, duration_s=60, seed=0))
    assert sum(ln["topic"].endswith("/obs") for ln in lines) >= 110


def test_demo_ward_mixes_scenarios() -> None:
    plans = load_scenario("demo").plan()
    assert len(plans) >= 5
    assert {p.source for p in plans} >= {"stable", "hemorrhage", "bolus_responder",
                                          "rv_failure"}
    assert [p.id for p in plans] == [f"bed-{i:02d}" for i in range(1, len(plans) + 1)]
    # more beds than the file has: the beds repeat with new patients and new ids
    more = load_scenario("demo").plan(14)
    assert len({p.id for p in more}) == 14 and more[6].source == more[0].source


@pytest.mark.parametrize("text, needle", [
    ('id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\npatient = { wieght_kg = 70 }',
     "wieght_kg"),
    ('id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\nevents = [{ at = "1m", do = "bleed" }]',
     "do"),
    ('id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\n'
     'events = [{ at = "soon", do = "bolus", volume_ml = 500 }]', "at"),
    ('id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\nmonitoring = { units = { CVP = "psi" } }',
     "psi"),
    ('id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\n'
     'events = [{ at = "1m", do = "change", set = { svr = 0.5 } }]', "svr"),
    ('id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\nscenario = "nowhere"', "nowhere"),
])
def test_scenario_errors_name_the_field(tmp_path: Path, text: str, needle: str) -> None:
    with pytest.raises(ScenarioError, match=needle):
        load_scenario(_write(tmp_path, text, "bad.toml"))


@pytest.mark.parametrize("patient, needle", [
    ('{ weight_kg = "heavy" }', "weight_kg"),
    ('{ sex = "x" }', "sex"),
    ('{ cvp = 12, pmsf = 10 }', "pmsf"),
])
def test_impossible_patients_name_the_bed_and_field(tmp_path: Path, patient: str,
                                                    needle: str) -> None:
    f = _write(tmp_path, f'id = "x"\ntitle = "x"\ndescription = "x"\n[[beds]]\n'
                         f'id = "b3"\npatient = {patient}\n', "bad.toml")
    with pytest.raises(ScenarioError, match=f"bed b3: .*{needle}"):
        list(generate(f, duration_s=2))


def test_durations() -> None:
    assert [parse_duration(x) for x in ("90s", "30m", "2h", "1h30m", "1h30m15s", "45")] == \
        [90, 1800, 7200, 5400, 5415, 45]
    for bad in ("2x", "", "h", "-5", "1m2h"):
        with pytest.raises(ValueError):
            parse_duration(bad)


# --------------------------------------------------------------------------- replay


def test_recording_replays_through_the_core_without_rejects(tmp_path: Path) -> None:
    replay = pytest.importorskip("hemostream.replay")
    path = tmp_path / "demo.jsonl"
    # the demo ward with its random artifacts, plus a bed with every artifact on purpose
    write_recording(generate("demo", duration_s=1200, seed=9), path)
    summary = replay.replay_file(path, db_url=f"sqlite:///{tmp_path / 'demo.db'}")
    assert summary.rejected == {}, summary.rejected
    assert summary.duplicates == 0
    assert summary.messages == summary.lines
    art = tmp_path / "artifacts.jsonl"
    write_recording(generate(_write(tmp_path, ARTIFACT_WARD), seed=3), art)
    summary = replay.replay_file(art, db_url=f"sqlite:///{tmp_path / 'art.db'}")
    assert summary.rejected == {}, summary.rejected
    assert summary.duplicates == 0
