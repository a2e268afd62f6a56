"""``hemostream report``: the HTML review page of a known, hand-made recording.

tests/data/compare-bed.jsonl: one bed of an invented test ward (TW7/bed-9), one message a
second for 600 s from 11:00:00 UTC on 2 March 2026: HR, arterial line (sys/dia/mean), CVP and
continuous CO. The admission overrides the HR high limit to 125 /min. Known events: HR 130
from 100 s to 160 s; arterial mean 55 from 300 s to 360 s, acknowledged at 400 s; a fluid
bolus note (250 mL over 3 min) at 200 s with CO stepping from 5.0 to 5.6 L/min at 330 s; a
deterioration_onset note at 290 s; a line flush (4 s at 300 mm[Hg]) at 450 s; a CVP zeroing
(status calibrating) at 520 s. tests/data/compare-bed.toml limits HR high 120 and ABP_MEAN
low 65 (high priority) and has no pattern rules.

Every expected count is worked out below from the recording and the configuration, with the
alarm lifecycle's definitions (docs/rules.md: alarm condition delay, clear delay, latching of
high priority by default).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import tomllib
import xml.etree.ElementTree as ET
from datetime import datetime, timezone
from pathlib import Path

import pytest

from hemostream.cli import main
from hemostream.replay import replay_file
from hemostream.config import load_config
from hemostream.review.panels import PANEL_KEYS

DATA = Path(__file__).resolve().parent / "data"
REC = DATA / "compare-bed.jsonl"
CFG = DATA / "compare-bed.toml"
SVG = "{http://www.w3.org/2000/svg}"
XHTML = "{http://www.w3.org/1999/xhtml}"


def _t(text: str) -> float:
    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


def _lines():
    return [json.loads(x) for x in REC.read_text().splitlines()]


def expected_alarms() -> list[tuple[str, float, float]]:
    """(rule, raised, cleared) worked out from the recording's values and the limits."""
    cfg = tomllib.loads(CFG.read_text())["rules"]["limits"]
    lines = _lines()
    admit = next(x["payload"] for x in lines if x["topic"].endswith("/admit"))
    hr_high = admit["limits"]["HR"]["high"]             # the admission replaces 120 by 125
    samples: dict[str, list[tuple[float, float]]] = {"HR": [], "ABP_MEAN": []}
    for x in lines:
        if x["topic"].endswith("/obs"):
            for o in x["payload"]["obs"]:
                if o["param"] in samples and o.get("status", "valid") == "valid":
                    samples[o["param"]].append((_t(x["payload"]["time"]), o["value"]))
    acks = [(_t(x["payload"]["time"]), x["payload"]["alarm"]) for x in lines
            if x["topic"].endswith("/cmd")]
    out = []
    for param, beyond, lim in (("HR", lambda v: v > hr_high, cfg["HR"]),
                               ("ABP_MEAN", lambda v: v < cfg["ABP_MEAN"]["low"],
                                cfg["ABP_MEAN"])):
        rule = f"{param}_{'high' if param == 'HR' else 'low'}"
        latching = (lim.get("high_priority" if param == "HR" else "low_priority") == "high")
        start = raised = None
        for t, v in samples[param]:
            if beyond(v):
                start = t if start is None else start
                if raised is None and t - start >= lim["delay_s"]:
                    raised = start + lim["delay_s"]
            else:
                if raised is not None:
                    ended = t + lim["clear_delay_s"]
                    if latching:    # stays until acknowledged (configs/rules.toml latching)
                        ended = min(a for a, r in acks if r == rule and a >= ended)
                    out.append((rule, raised, ended))
                start = raised = None
    return sorted(out, key=lambda x: x[1])


def _merged_states(alarms) -> int:
    """Stretches of time with at least one alarm (the value panels shade one band per
    stretch of the same highest priority; these alarms have one priority each)."""
    spans = sorted((a, b) for _, a, b in alarms)
    n, end = 0, None
    for a, b in spans:
        if end is None or a > end:
            n += 1
            end = b
        else:
            end = max(end, b)
    return n


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    url = f"sqlite:///{d / 'bed.db'}"
    replay_file(REC, url, load_config(CFG))
    out = d / "bed-9.html"
    assert main(["report", "--db", url, "--config", str(CFG), "--bed", "TW7/bed-9",
                 "--out", str(out), "--png"]) == 0
    return d, url, out


@pytest.fixture(scope="module")
def page(built):
    _, _, out = built
    text = out.read_text(encoding="utf-8")
    return text, ET.fromstring(text)


def test_page_is_well_formed_and_self_contained(page):
    text, root = page
    assert root.tag == f"{XHTML}html"                    # it parsed as XML: well-formed
    ids = [e.get("id") for e in root.iter() if e.get("id")]
    assert len(ids) == len(set(ids)), "every id is unique in the page (SVGs side by side)"
    assert "<script" not in text and "<link" not in text and "<img" not in text
    assert not re.search(r'\b(src|href)="(?!#)', text), "nothing is loaded from anywhere"
    urls = set(re.findall(r"https?://[^\s\"')<]+", text))
    assert urls <= {"http://www.w3.org/1999/xhtml", "http://www.w3.org/2000/svg",
                    "http://www.w3.org/1999/xlink"}, urls     # namespace names only
    # the caution, as the project requires wherever values and alarms are shown
    assert "not a medical device" in text and "primary alarm source" in text
    assert "not a clinical validation" in text


def test_one_plot_per_panel_with_the_alarm_spans_and_notes(page):
    _, root = page
    alarms = expected_alarms()
    assert [a[0] for a in alarms] == ["HR_high", "ABP_MEAN_low"]
    n_notes = sum(1 for x in _lines() if x["topic"].endswith("/note"))
    assert n_notes == 4
    figures = {f.get("id"): f for f in root.iter(f"{XHTML}figure")}
    assert sorted(figures) == sorted(f"panel-{k}" for k in PANEL_KEYS)
    assert len(PANEL_KEYS) == 7      # time line + arterial, HR, CVP, CO/CI, SVR, SI
    for key in PANEL_KEYS:
        fig = figures[f"panel-{key}"]
        svgs = list(fig.iter(f"{SVG}svg"))
        assert len(svgs) == 1, key
        groups = list(svgs[0].iter(f"{SVG}g"))
        spans = [g for g in groups if g.get("class") == "alarm-span"]
        notes = [g for g in groups if g.get("class") == "note"]
        # the time line has one bar per alarm (one priority each here); the value panels
        # one band per stretch of alarm state
        assert len(spans) == (len(alarms) if key == "alarms" else _merged_states(alarms)), key
        assert len(notes) == n_notes, key
        assert fig.get("data-alarm-spans") == str(len(spans))
        for g in spans + notes:
            assert g.find(f"{SVG}title") is not None      # hover text
    # the time line's bars say what they are, when, and who acknowledged
    tl = figures["panel-alarms"]
    titles = [g.find(f"{SVG}title").text for g in tl.iter(f"{SVG}g")
              if g.get("class") == "alarm-span"]
    assert titles[0].startswith("HR high (medium priority")          # the phrase
    assert titles[1].startswith("arterial mean low (high priority")
    assert "acknowledged 11:06:40 by RN M. Vasquez-Hale" in titles[1]
    # raised and cleared times in the alarm table agree with the worked-out ones
    table = ET.tostring(root, encoding="unicode")
    for rule, a, b in alarms:
        ra = datetime.fromtimestamp(a, timezone.utc).strftime("%Y-%m-%d %H:%M:%S")
        rb = datetime.fromtimestamp(b, timezone.utc).strftime("%Y-%m-%d %H:%M:%S")
        assert ra in table and rb in table, (rule, ra, rb)


def test_fluid_challenge_limits_and_provenance(page):
    text, root = page
    figs = {f.get("id"): f for f in root.iter(f"{XHTML}figure")}
    results = [g for g in figs["panel-output"].iter(f"{SVG}g")
               if g.get("class") == "fluid-result"]
    assert len(results) == 1
    # stroke volume = CO / HR (textbook definition): 5.0 L/min / 80 = 62.5 mL before, 5.6 /
    # 80 = 70 mL in the window around the end of the infusion: +12 %, at least the 10 %
    # that marks a responder (Monnet, Marik, Teboul 2016, from memory)
    change = (5.6 / 80 - 5.0 / 80) / (5.0 / 80) * 100
    assert f"{change:+.0f} %" in results[0].find(f"{SVG}title").text
    assert "responsive" in results[0].find(f"{SVG}title").text
    assert f"{change:+.1f} %" in text
    # limits drawn: the admission's HR override and the configuration's pressure limit
    limits = root.find(f".//{XHTML}h2[@id='limits']")
    assert limits is not None
    assert re.search(r"HR high</td><td>125 from [0-9:]+</td><td>admission override", text)
    assert re.search(r"ABP_MEAN low</td><td>65 from [0-9:]+</td><td>configuration", text)
    # provenance: SVR from the arterial mean, CVP and CO, each with its measurement time
    prov = root.find(f".//{XHTML}details[@id='provenance-SVR']")
    assert prov is not None
    row = ET.tostring(prov, encoding="unicode")
    assert "ABP_MEAN at" in row and "CVP at" in row and "CO at" in row


def test_png_files(built):
    from PIL import Image     # matplotlib's own dependency

    d, _, out = built
    for key in PANEL_KEYS:
        p = d / f"{out.stem}-{key}.png"
        with Image.open(p) as im:
            assert im.format == "PNG" and im.width > 1000


def test_unit_overview_links_the_bed_pages(built, tmp_path):
    _, url, _ = built
    out = tmp_path / "ward.html"
    assert main(["report", "--db", url, "--config", str(CFG), "--unit", "TW7",
                 "--out", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    root = ET.fromstring(text)
    links = [a.get("href") for a in root.iter(f"{XHTML}a")]
    assert links == ["ward-bed-9.html"]
    assert (tmp_path / "ward-bed-9.html").is_file()
    row = next(tr for tr in root.iter(f"{XHTML}tr") if tr.find(f".//{XHTML}a") is not None)
    cells = [ET.tostring(td, encoding="unicode", method="text") for td in row]
    # high, medium, low, technical (physiological counted by their highest priority)
    assert cells[3:7] == ["1", "1", "0", "0"]
    assert "not a medical device" in text


def test_errors(built, tmp_path, capsys):
    _, url, _ = built
    assert main(["report", "--db", url, "--bed", "bed-77", "--out",
                 str(tmp_path / "x.html")]) == 1
    assert "no bed 'bed-77'" in capsys.readouterr().err
    assert main(["report", "--db", f"sqlite:///{tmp_path / 'none.db'}", "--bed", "bed-9",
                 "--out", str(tmp_path / "x.html")]) == 1
    assert "does not exist" in capsys.readouterr().err
    assert main(["report", "--db", url, "--bed", "bed-9", "--from", "yesterday",
                 "--out", str(tmp_path / "x.html")]) == 2


def test_renders_in_headless_chromium(built, tmp_path):
    """Debian's chromium renders the page to a PNG without errors, and the alarm colours
    (IEC 60601-1-8: high red, medium yellow) are in the picture."""
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed (apt-get install -y chromium)")
        pytest.skip("chromium is not installed (apt-get install -y chromium); CI must have it")
    _, _, out = built
    shot = tmp_path / "shot.png"
    proc = subprocess.run(
        [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
         f"--screenshot={shot}", "--window-size=1400,2000", out.resolve().as_uri()],
        capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    from PIL import Image

    import numpy as np

    with Image.open(shot) as im:
        assert im.size == (1400, 2000)
        px = np.asarray(im.convert("RGB")).astype(int)
    r, g, b = px[..., 0], px[..., 1], px[..., 2]
    red = int(((r > 200) & (g > 20) & (g < 60) & (b < 60)).sum())
    yellow = int(((r > 220) & (g > 180) & (g < 215) & (b < 40)).sum())
    dark = int((r + g + b < 150).sum())
    assert red > 300 and yellow > 300, (red, yellow)     # the alarm bars of the time line
    assert dark > 5000                                     # text, axes and value lines


def test_limits_come_from_the_configuration_stored_with_the_data(built, tmp_path):
    # the replay stored tests/data/compare-bed.toml with the data; a report given only the
    # built-in defaults (no ABP_MEAN limit there) still draws the limits that applied
    from sqlalchemy import create_engine, text as sql

    d, url, _ = built
    out = tmp_path / "defaults.html"
    assert main(["report", "--db", url, "--bed", "TW7/bed-9", "--out", str(out)]) == 0
    page = out.read_text(encoding="utf-8")
    assert re.search(r"ABP_MEAN low</td><td>65 from [0-9:]+</td><td>configuration", page)
    assert re.search(r"HR high</td><td>125 from [0-9:]+</td><td>admission override", page)
    assert "stored with the data" in page.split('id="limits-source"')[1][:200]

    # a database from before configurations were stored: the report's own, and it says so
    old = tmp_path / "old.db"
    for suffix in ("", "-wal", "-shm"):
        src = Path(url[len("sqlite:///"):] + suffix)
        if src.exists():
            shutil.copy(src, str(old) + suffix)
    eng = create_engine(f"sqlite:///{old}")
    with eng.begin() as c:
        c.execute(sql("DROP TABLE config_snapshots"))
    eng.dispose()
    out2 = tmp_path / "old.html"
    assert main(["report", "--db", f"sqlite:///{old}", "--bed", "TW7/bed-9",
                 "--out", str(out2)]) == 0
    page2 = out2.read_text(encoding="utf-8")
    assert "no stored configuration" in page2
    assert "ABP_MEAN low" not in page2


def test_periods_of_values_that_are_not_ok_are_shaded(page):
    """The line flush note at 450 s (6 s, ABP) and the CVP zeroing at 520 s (12 s, status
    calibrating for 10 values): their panels shade those stretches and say why; the heart
    rate, which neither touches, has none (core/quality.py; docs/rules.md)."""
    _, root = page
    lines = _lines()
    start = _t(next(x for x in lines if x["topic"].endswith("/obs"))["payload"]["time"])
    notes = {x["payload"]["kind"]: _t(x["payload"]["time"]) for x in lines
             if x["topic"].endswith("/note")}
    figures = {f.get("id"): f for f in root.iter(f"{XHTML}figure")}

    def spans(key):
        return [g.find(f"{SVG}title").text for g in figures[f"panel-{key}"].iter(f"{SVG}g")
                if g.get("class") == "quality-span"]

    def covers(titles, t, words):
        hhmmss = datetime.fromtimestamp(t, timezone.utc).strftime("%H:%M:%S")
        for text in titles:
            a, b = re.findall(r"\d\d:\d\d:\d\d", text)[:2]
            if a <= hhmmss <= b and all(w in text for w in words):
                return True
        return False

    assert notes["line_flush"] - start == 450 and notes["zeroing"] - start == 520
    art = spans("arterial")
    assert covers(art, notes["line_flush"] + 2, ("artifact", "ABP_MEAN")), art
    assert not covers(art, start + 200, ()), "no shading where the line was fine"
    cvp = spans("cvp")
    assert covers(cvp, notes["zeroing"] + 3, ("CVP",)), cvp
    assert any("calibrating" in s or "artifact" in s for s in cvp)
    assert covers(spans("svr"), notes["zeroing"] + 3, ("artifact", "SVR"))   # uses CVP
    assert spans("hr") == []
    # the provenance table gives each stored derived value's quality
    prov = root.find(f".//{XHTML}details[@id='provenance-SVR']")
    cells = [td.text for td in prov.iter(f"{XHTML}td")]
    assert "artifact" in cells and "ok" in cells
