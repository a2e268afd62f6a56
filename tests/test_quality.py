"""Quality travels with every value (issue 14, item 1): from the status as received, from the
artifact detector, from notes, and for a derived value the worst of its inputs; on the
dashboard, in the published derived messages, in the store and in ``hemostream query``.

The clinical facts the expectations rest on: blood is drawn from an arterial line through the
stopcock's sampling port with the arterial pressure alarms silenced, then the line is flushed
([taylor2011], skill 16-3: published); a line closed between patient and transducer shows no
arterial pulse ([flatwave2022]: published); the transducer then reads a flat trace near zero, or
the flush bag's pressure while flushed (common practice). Nothing computed from that pressure
(shock index, SVR, pulse pressure) describes the patient. A flush or zeroing of a central
venous line likewise spoils CVP and what uses it (SVR), not what does not (CI, SI): common
practice (the formulas, docs/rules.md).
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import textwrap
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from rich.console import Console

from hemostream.app.demo import Summary
from hemostream.core.config import Config
from hemostream.core.processor import Processor
from hemostream.core.quality import worst
from hemostream.dashboard import Screen, UnitView, bed_screen, unit_screen
from hemostream.dashboard.render import _current_of, value_text
from hemostream.pipeline import make_rules
from hemostream.replay import replay_file
from hemostream.store import derived_rows, observation_rows
from hemostream.store.chunks import block_of, decode, merge
from hemostream.store import codec
from simulators import generate, write_recording

DRAW_AT, DRAW_FOR = 180, 25          # seconds after the start (the ward below)
WARD = f"""
    id = "draw_ward"
    title = "A blood sample from the arterial line"
    description = "One bed; an arterial blood sample at a known time, with its note"
    unit = "TQ1"
    duration = "6m"

    [defaults]
    artifacts = {{ random = false }}
    monitoring = {{ nibp_every = "0s", pawp_every = "0s", co_every = "0s" }}

    [[beds]]
    id = "bed-03"
    events = [ {{ at = "{DRAW_AT}s", do = "sample_draw", for = "{DRAW_FOR}s" }} ]
"""


def _t(s: str) -> float:
    return datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp()


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).isoformat().replace("+00:00", "Z")


def _ward(tmp_path: Path) -> Path:
    p = tmp_path / "draw.toml"
    p.write_text(textwrap.dedent(WARD), encoding="utf-8")
    return p


def _run(lines, on_publish):
    cfg = Config()
    proc = Processor(cfg, rules=make_rules(cfg))
    for line in lines:
        proc.feed(line["topic"], line["payload"], _t(line["rx"]))
        for topic, body, _retain in proc.drain().publish:
            on_publish(topic, body)


# --------------------------------------------------------------------------- the demo case


def test_sample_draw_shows_no_current_si_or_svr_from_the_closed_line(tmp_path):
    lines = list(generate(str(_ward(tmp_path)), seed=4))
    start = _t(lines[0]["payload"]["time"])
    t_draw = start + DRAW_AT
    # the recording is what the issue describes: a flat, near-zero line, status valid, a note
    flat = [o for ln in lines if ln["topic"].endswith("/obs")
            and t_draw + 1 <= _t(ln["payload"]["time"]) < t_draw + DRAW_FOR - 4
            for o in ln["payload"]["obs"] if o["param"] == "ABP_SYS"]
    assert flat and all(o["value"] < 15 and o.get("status", "valid") == "valid" for o in flat)
    assert any(ln["topic"].endswith("/note") and ln["payload"]["kind"] == "sample_draw"
               for ln in lines)

    view, plain = UnitView(), Summary()
    seen = {"before": 0, "during": 0}
    checked = []

    def on_publish(topic, body):
        view.apply(topic, body)
        plain.apply(topic, body)
        if not topic.endswith("/derived"):
            return
        t = _t(body["time"])
        b = view.beds["TQ1/bed-03"]
        if t_draw - 60 <= t < t_draw:
            # before the draw: SI and SVR are current values, shown plainly
            assert {"SI", "SVR"} <= set(body["values"]), body
            seen["before"] += 1
        elif t_draw + 0.5 <= t < t_draw + DRAW_FOR:
            seen["during"] += 1
            # published: not among the current values, but withheld with their quality
            assert not {"SI", "MSI", "SVR", "PP"} & set(body["values"]), body
            assert body["quality"]["SI"]["quality"] == "artifact"
            assert "sample draw" in body["quality"]["SI"]["reason"]
            assert "SI" in body["withheld"]
            # the dashboard model: no current number for them
            current = _current_of(b, t)
            for p in ("SI", "SVR", "PP", "ABP_SYS", "ABP_MEAN"):
                assert current(p) is None, p
                txt = value_text(b, p, t)
                assert "artifact" in txt.plain and "sample draw" in txt.plain, txt.plain
                assert all("bold" not in str(s.style) for s in txt.spans), txt.spans
            # the plain demo lines name them instead of showing a number
            line = next(x for x in plain.lines() if "TQ1/bed-03" in x)
            assert "SI (artifact)" in line and "SVR (artifact)" in line, line
            if not checked:
                c = Console(width=110, height=60, record=True)
                c.print(bed_screen(view, Screen(unit="TQ1", source="test"), b, t, 110, 60))
                checked.append(c.export_text())
                c = Console(width=110, height=30, record=True)
                c.print(unit_screen(view, Screen(unit="TQ1", source="test"), t, 110, 30))
                checked.append(c.export_text())

    _run(lines, on_publish)
    assert seen["before"] >= 50 and seen["during"] >= DRAW_FOR - 2, seen
    detail = checked[0]
    rows = {x.strip("│ ").split(" ")[0]: x for x in detail.splitlines()}
    for p in ("SI", "SVR", "ABP_SYS"):
        assert "artifact" in rows[p] and "sample draw" in rows[p], rows[p]
    assert "artifact" not in rows["HR"] and "artifact" not in rows["CI"]
    tile = checked[1]          # the bed's tile: each value marked, the reason in its title
    assert "bed-03 sample draw (note)" in tile, tile
    assert re.search(r"SI [\d.]+ artifact", tile) and re.search(r"SVR \d+ artifact", tile)
    assert re.search(r"ABP [\d/ ()]+ artifact", tile), tile


def test_query_returns_the_quality_and_filters_on_it(tmp_path):
    rec = tmp_path / "draw.jsonl"
    write_recording(generate(str(_ward(tmp_path)), seed=4), rec)
    url = f"sqlite:///{tmp_path / 'q.db'}"
    replay_file(rec, url)
    first = json.loads(rec.read_text().splitlines()[0])
    t_draw = _t(first["payload"]["time"]) + DRAW_AT
    window = (t_draw + 1, t_draw + DRAW_FOR - 1)

    def cli(*args):
        return subprocess.run([sys.executable, "-m", "hemostream.cli", "query", *args,
                               "--db", url], capture_output=True, text=True, timeout=120)

    def q(*args):
        r = cli(*args, "--format", "jsonl")
        assert r.returncode == 0, r.stderr
        return [json.loads(x) for x in r.stdout.splitlines()]

    every = q("derived", "--param", "SI")
    assert every and all(r["quality"] in ("ok", "artifact") for r in every)
    ok = q("derived", "--param", "SI", "--quality", "ok")
    assert ok and all(r["quality"] == "ok" for r in ok)
    assert not [r for r in ok if window[0] <= _t(r["time"]) <= window[1]], \
        "an SI from the closed line is not an ok value"
    art = q("derived", "--quality", "artifact")
    assert {r["param"] for r in art} >= {"SI", "SVR"}
    assert any(window[0] <= _t(r["time"]) <= window[1] for r in art)
    assert len(ok) + len([r for r in art if r["param"] == "SI"]) == len(every)
    # observations: the line's values are artifacts, stored as received (status valid)
    abp = [r for r in q("observations", "--param", "ABP_SYS", "--quality", "artifact")]
    assert abp and all(r["status"] == "valid" for r in abp)
    assert all(window[0] - 1 <= _t(r["time"]) for r in abp)
    hr = q("observations", "--param", "HR", "--quality", "ok,artifact")
    assert hr and all(r["quality"] == "ok" for r in hr)      # the draw does not touch HR
    # the table shows the quality too; a bad quality name is an error, not an empty answer
    r = cli("derived", "--param", "SI", "--limit", "3")
    assert r.returncode == 0 and "quality" in r.stdout
    r = cli("derived", "--quality", "good")
    assert r.returncode == 2 and "unknown 'good'" in r.stderr
    assert cli("notes", "--quality", "ok").returncode == 2


# --------------------------------------------------------------------------- the rules


def _obs(t, seq, cvp=8.0, cvp_status="valid"):
    return {"v": 1, "device": "gw-q", "seq": seq, "time": _iso(t), "obs": [
        {"param": "HR", "value": 80, "unit": "/min"},
        {"param": "ABP_SYS", "value": 120, "unit": "mm[Hg]"},
        {"param": "ABP_DIA", "value": 70, "unit": "mm[Hg]"},
        {"param": "ABP_MEAN", "value": 87, "unit": "mm[Hg]"},
        {"param": "CVP", "value": cvp, "unit": "mm[Hg]", "status": cvp_status},
        {"param": "CO", "value": 5.0, "unit": "L/min"}]}


T0 = 1796112000.0           # 2026-12-01T08:00:00Z


def _recording(tmp_path: Path, notes=(), statuses=None) -> Path:
    lines = [{"rx": _iso(T0 - 1), "topic": "hemo/TQ2/bed-1/admit",
              "payload": {"v": 1, "time": _iso(T0 - 1), "height_cm": 175, "weight_kg": 80}}]
    for k in range(120):
        t = T0 + k
        for at, note in notes:
            if at == k:
                lines.append({"rx": _iso(t + 0.01), "topic": "hemo/TQ2/bed-1/note",
                              "payload": {"v": 1, "time": _iso(t), **note}})
        st = (statuses or {}).get(k, "valid")
        lines.append({"rx": _iso(t + 0.05), "topic": "hemo/TQ2/bed-1/obs",
                      "payload": _obs(t, k, cvp_status=st)})
    p = tmp_path / "rec.jsonl"
    p.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return p


def test_a_flush_note_marks_its_channel_for_its_window_and_nothing_else(tmp_path):
    rec = _recording(tmp_path, notes=[(30, {"kind": "line_flush", "param": "CVP",
                                            "duration_s": 20})])
    db = tmp_path / "n.db"
    replay_file(rec, f"sqlite:///{db}")
    cvp = {round(r["time"] - T0): r["quality"] for r in observation_rows(db)
           if r["param"] == "CVP"}
    # the CVP values look normal (8 mm[Hg]): only the note says the line was being flushed
    assert all(cvp[k] == "artifact" for k in range(30, 51)), cvp
    assert all(cvp[k] == "ok" for k in list(range(0, 30)) + list(range(51, 120)))
    others = {r["quality"] for r in observation_rows(db) if r["param"] != "CVP"}
    assert others == {"ok"}                  # the arterial line, HR, CO: not touched


def test_a_derived_value_has_the_worst_quality_of_its_inputs(tmp_path):
    rec = _recording(tmp_path, notes=[(30, {"kind": "zeroing", "param": "CVP",
                                            "duration_s": 20})])
    db = tmp_path / "d.db"
    replay_file(rec, f"sqlite:///{db}")
    rows = derived_rows(db)
    # every value is constant, so a derived value is stored when it first appears, once a
    # minute, and when its quality changes
    for p in ("SVR", "SVRI"):    # SVR = (MAP - CVP) x 80 / CO: it uses CVP, an artifact
        mine = [r for r in rows if r["param"] == p and r["time"] >= T0 + 30]
        assert mine[0]["time"] == T0 + 30 and mine[0]["quality"] == "artifact", mine[:2]
        assert "CVP" in {i for i, _ in json.loads(mine[0]["inputs"])}
        assert mine[1]["time"] == T0 + 51 and mine[1]["quality"] == "ok", mine[:2]
    for r in rows:
        inputs = {i for i, _ in json.loads(r["inputs"])}
        if "CVP" not in inputs:
            assert r["quality"] == "ok", r
    assert {r["param"] for r in rows if r["quality"] == "artifact"} == {"SVR", "SVRI"}
    assert worst(["ok", "questionable", "artifact"]) == "artifact"
    assert worst(["artifact", "invalid"]) == "invalid"


def test_a_status_is_the_quality_as_received_and_stored(tmp_path):
    rec = _recording(tmp_path, statuses={40: "questionable", 41: "invalid", 42: "test"})
    db = tmp_path / "s.db"
    replay_file(rec, f"sqlite:///{db}")
    got = {round(r["time"] - T0): (r["status"], r["quality"]) for r in observation_rows(db)
           if r["param"] == "CVP" and 39 <= r["time"] - T0 <= 43}
    assert got == {39: ("valid", "ok"), 40: ("questionable", "questionable"),
                   41: ("invalid", "invalid"), 42: ("test", "test"), 43: ("valid", "ok")}


# --------------------------------------------------------------------------- storage


def test_quality_is_stored_only_where_it_says_something():
    ok_obs = [(1, 1, "HR", 0.0, 80.0, "/min", 80.0, "/min", "valid", False, "ok"),
              (1, 1, "CVP", 0.0, 8.0, "mm[Hg]", 8.0, "mm[Hg]", "calibrating", False,
               "calibrating")]
    art_obs = [(2, 1, "ABP_SYS", 1.0, 6.0, "mm[Hg]", 6.0, "mm[Hg]", "valid", False,
                "artifact")]
    der = [{"param": "SI", "time": 1.0, "value": 13.3, "unit": "1", "inputs": "[]",
            "quality": "artifact"}]
    plain = block_of(ok_obs, [], 1)
    assert "o_quality" not in plain and "d_quality" not in plain    # the status says it
    marked = block_of(art_obs, der, 1)
    assert marked["o_quality"] == ["artifact"] and marked["d_quality"] == ["artifact"]
    both = decode(codec.encode(merge([plain, decode(codec.encode(marked))])))
    assert both["o_quality"] == ["ok", "calibrating", "artifact"]
    assert both["d_quality"] == ["artifact"]
    # a chunk of 900 one-second messages of 10 ok values: the quality costs nothing; with a
    # 30-second artifact on 3 of its parameters a few bytes
    n = 9000
    rows = [(k // 10, 1, f"P{k % 10}", float(k // 10), 72.0 + k % 7, "/min", 72.0 + k % 7,
             "/min", "valid", False, "artifact" if 300 <= k // 10 < 330 and k % 10 < 3
             else "ok") for k in range(n)]
    clean = [r[:10] + ("ok",) for r in rows]
    size = {name: len(codec.encode(block_of(r, [], 1), level=9))
            for name, r in (("clean", clean), ("marked", rows))}
    assert size["marked"] - size["clean"] < 200, size
    assert np.array_equal(decode(codec.encode(block_of(rows, [], 1)))["o_time"],
                          [r[3] for r in rows])


def test_the_demo_wards_sample_draw_on_bed_03():
    """The case of issue 14: `hemostream demo` (its default ward and seed) draws a blood
    sample from bed-03's arterial line early on; for that half minute neither the dashboard
    nor the plain demo lines may show an SI or SVR as a current value."""
    from itertools import takewhile

    from hemostream.app.demo import demo_lines

    lines, _source = demo_lines()
    first = next(lines)
    start = _t(first["rx"])
    head = [first] + list(takewhile(lambda x: _t(x["rx"]) < start + 240, lines))
    note = next(x for x in head if x["topic"] == "hemo/SDU2/bed-03/note"
                and x["payload"]["kind"] == "sample_draw")
    t_draw, dur = _t(note["payload"]["time"]), note["payload"]["duration_s"]
    view, plain = UnitView(), Summary()
    during = []

    def on_publish(topic, body):
        view.apply(topic, body)
        plain.apply(topic, body)
        if topic != "hemo/SDU2/bed-03/derived":
            return
        t = _t(body["time"])
        if t_draw + 0.5 <= t < t_draw + dur:
            during.append(t)
            current = _current_of(view.beds["SDU2/bed-03"], t)
            assert current("SI") is None and current("SVR") is None
            assert not {"SI", "MSI", "SVR", "SVRI", "PP"} & set(body["values"]), body
            line = next(x for x in plain.lines() if "SDU2/bed-03" in x)
            assert " SI (" in line and " SVR (" in line, line
            assert not re.search(r"\bS(I|VR) \d", line), line

    _run(head, on_publish)
    assert len(during) >= dur - 2
