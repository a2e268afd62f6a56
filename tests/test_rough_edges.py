"""The rough edges a walkthrough of every command found, each driven as a user runs it."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def hemostream(*args: str, timeout: float = 120, cwd: Path | None = None,
               check_rc: int | None = None) -> subprocess.CompletedProcess:
    p = subprocess.run([sys.executable, "-m", "hemostream.app.cli", *args], cwd=cwd or ROOT,
                       capture_output=True, text=True, timeout=timeout)
    if check_rc is not None:
        assert p.returncode == check_rc, (p.returncode, p.stdout[-2000:], p.stderr[-2000:])
    return p


def start(*args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "hemostream.app.cli", *args], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def read_until(p: subprocess.Popen, needle: str, seconds: float) -> str:
    """Lines of ``p``'s output until one holds ``needle`` (fails after ``seconds``)."""
    seen = []
    end = time.monotonic() + seconds
    os.set_blocking(p.stdout.fileno(), False)
    while time.monotonic() < end:
        line = p.stdout.readline()
        if line:
            seen.append(line)
            if needle in line:
                return "".join(seen)
        else:
            time.sleep(0.05)
    raise AssertionError(f"{needle!r} not seen in {seconds} s:\n" + "".join(seen))


# --------------------------------------------------------------- 1. demo without its broker

@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_demo_without_broker_says_so_and_ends_on_signal(tmp_path, sig):
    p = start("demo", "--broker", "mqtt://127.0.0.1:1", "--plain", "--every", "0.5",
              "--db", f"sqlite:///{tmp_path}/d.db")
    try:
        read_until(p, "waiting for the broker at mqtt://127.0.0.1:1: not connected", 30)
        p.send_signal(sig)
        t0 = time.monotonic()
        p.wait(timeout=5)
        assert time.monotonic() - t0 < 3.0
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()


def test_demo_without_broker_ends_after_its_duration(tmp_path):
    t0 = time.monotonic()
    r = hemostream("demo", "--broker", "mqtt://127.0.0.1:1", "--plain", "--duration", "2",
                   "--every", "0.5", "--db", f"sqlite:///{tmp_path}/d.db", timeout=60)
    assert time.monotonic() - t0 < 30
    assert r.returncode == 1
    assert "no connection to the broker at mqtt://127.0.0.1:1" in r.stderr


# --------------------------------------------------------------- 2. the same file twice

EXAMPLE = ROOT / "simulators" / "recordings" / "example-ward.jsonl"


def _counts(db: Path) -> dict[str, int]:
    import sqlite3

    from hemostream.store import derived_rows, message_count, observation_rows, open_engine
    engine = open_engine(f"sqlite:///{db}", create=False)
    try:
        n = message_count(engine)
    finally:
        engine.dispose()
    with sqlite3.connect(db) as c:
        events = c.execute("select count(*) from alarm_events").fetchone()[0]
    return {"messages": n, "observations": len(observation_rows(db)),
            "derived": len(derived_rows(db)), "alarm_events": events}


def test_replaying_a_file_twice_stores_nothing_twice(tmp_path):
    db = tmp_path / "w.db"
    hemostream("replay", str(EXAMPLE), "--db", f"sqlite:///{db}", check_rc=0)
    first = _counts(db)
    assert first["messages"] > 1000
    r = hemostream("replay", str(EXAMPLE), "--db", f"sqlite:///{db}", check_rc=0)
    assert _counts(db) == first
    assert "already in the database" in r.stdout


# --------------------------------------------------------------- 3. one number format

def test_alarm_list_shows_current_value_with_unit_or_words():
    from rich.console import Console
    from hemostream.dashboard import Screen, UnitView, unit_screen
    t = 1796112000.0
    iso = "2026-12-01T08:00:00Z"
    v = UnitView()
    v.apply("hemo/SDU7/bed-01/derived", {"v": 1, "time": iso, "values": {"SI": 0.95},
                                         "measured": {"CVP": [6.0, iso], "HR": [110, iso]}})
    v.apply("hemo/SDU7/bed-01/alarm", {"v": 1, "time": iso, "state": {"alarms": [
        {"id": "a1", "rule": "shock_index_high", "priority": "low", "since": t - 60,
         "value": 0.9261, "message": "shock index high", "category": "physiological",
         "details": {"terms": [{"param": "SI", "value": 0.9261, "at_least": 0.9}]}},
        {"id": "a2", "rule": "right_heart_mismatch", "priority": "medium", "since": t - 30,
         "value": 8.17, "category": "physiological", "message": "pump mismatch",
         "details": {"terms": [{"param": "CVP", "level": 8.17, "required": "rising",
                                "slope_per_10min": -0.0817}]}},
        {"id": "a3", "rule": "arterial_line_silent", "priority": "low", "since": t - 10,
         "value": 719, "category": "technical", "message": "no data from the arterial line"},
    ]}})
    c = Console(width=160, height=40, record=True, force_terminal=True)
    c.print(unit_screen(v, Screen(unit="SDU7", source="test"), t + 1, 160, 40))
    text = c.export_text()
    assert "SI 0.95" in text                      # the current value, not 0.926 at raise
    assert "CVP 6 mm[Hg] rising" in text
    assert "no data from the arterial line" in text
    assert "719" not in text and "-0.0817" not in text and "0.926" not in text
    assert "CVP 6" in text and "CVP 6.0" not in text


def test_demo_summary_and_report_use_the_tile_formats(tmp_path):
    db = tmp_path / "w.db"
    r = hemostream("demo", "--plain", "--duration", "60", "--speed", "60", "--every", "0.5",
                   "--db", f"sqlite:///{db}", check_rc=0, timeout=120)
    import re
    assert re.search(r"\bCVP \d+(\s|$)", r.stdout), r.stdout[-1500:]
    assert not re.search(r"\bCVP \d+\.\d\d\b", r.stdout)
    hemostream("replay", str(EXAMPLE), "--db", f"sqlite:///{tmp_path}/r.db", check_rc=0)
    out = tmp_path / "r.html"
    hemostream("report", "--db", f"sqlite:///{tmp_path}/r.db", "--bed", "SDU4/bed-02",
               "--out", str(out), check_rc=0)
    html = out.read_text()
    assert "SI 0.93" in html                      # the alarm's value, with the SI format
    assert not re.search(r"<td[^>]*>\d+\.\d\d</td><td[^>]*>mm\[Hg\]", html)


# --------------------------------------------------------------- 4. staleness

def test_every_value_is_stale_by_its_own_rule_and_a_lagging_feed_warns():
    from rich.console import Console
    from hemostream.dashboard import Screen, UnitView, bed_screen, unit_screen
    t = 1796112000.0

    def iso(x):
        from datetime import datetime, timezone
        return datetime.fromtimestamp(x, timezone.utc).isoformat().replace("+00:00", "Z")
    v = UnitView()
    old = t - 57
    # the last derived message: SI computed from HR and ABP measured 57 s ago
    v.apply("hemo/SDU7/bed-01/derived", {
        "v": 1, "time": iso(t - 5), "values": {"SI": 0.8, "MAP": 87.0},
        "measured": {"HR": [96, iso(old)], "ABP_SYS": [120, iso(old)],
                     "ABP_DIA": [70, iso(old)], "SPO2": [97, iso(old)]}})
    scr = Screen(unit="SDU7", source="test", connected=True, lag_s=57.0)
    c = Console(width=74, height=40, record=True, force_terminal=True)
    c.print(unit_screen(v, scr, t, 74, 40))
    text = c.export_text()
    for label in ("HR 96 stale", "SpO2 97 stale", "SI 0.80 stale"):
        assert label in text, text
    assert "FEED LAGGING 57s" in text
    b = v.beds["SDU7/bed-01"]
    c = Console(width=160, height=40, record=True, force_terminal=True)
    c.print(bed_screen(v, scr, b, t, 160, 40))
    detail = c.export_text()
    for p in ("SI", "MAP", "HR", "SPO2"):
        line = next(x for x in detail.splitlines() if x.lstrip("│ ").startswith(p + " "))
        assert "stale" in line, line


# --------------------------------------------------------------- 5. a / p keys

def test_a_and_p_act_on_the_highest_unacknowledged_alarm_once(tmp_path):
    from rich.console import Console
    from hemostream.dashboard import Dashboard, Screen, UnitView
    t = 1796112000.0
    v = UnitView()

    def state(acked_high: bool) -> None:
        v.apply("hemo/SDU7/bed-01/alarm", {"v": 1, "time": "2026-12-01T08:00:00Z",
                                           "state": {"alarms": [
            {"id": "hyp#1", "rule": "hypotension", "priority": "high", "since": t - 90,
             "acknowledged": acked_high},
            {"id": "lo#1", "rule": "low_output", "priority": "medium", "since": t - 30,
             "acknowledged": False},
            {"id": "si#1", "rule": "shock_index_high", "priority": "low", "since": t - 10,
             "acknowledged": False}]}})
    state(acked_high=True)
    sent = []
    c = Console(width=120, height=40, record=True, force_terminal=True)
    d = Dashboard(v, Screen(unit="SDU7", source="test", operator="RN K. Obi"),
                  send_command=lambda *cmd: sent.append(cmd), clock=lambda: t, console=c)
    d.press("a")
    assert sent == [("SDU7/bed-01", "acknowledge", "lo#1")]    # not the acknowledged one
    c.print(d.render())
    assert "acknowledgement of low_output (medium) on bed-01 sent" in c.export_text()
    d.press("a")                                    # before the service confirmed it
    assert len(sent) == 1
    c.print(d.render())
    assert "already sent" in c.export_text()
    d.press("p")
    assert sent[-1] == ("SDU7/bed-01", "pause_audio", "lo#1")


# --------------------------------------------------------------- 6. event order

def test_no_alarm_event_before_its_raise_and_no_negative_durations(tmp_path):
    import re
    import sqlite3
    db = tmp_path / "d.db"
    # fast: a feed silence is raised on a clock tick, and its end is seen on a measurement
    # that was timed a little earlier
    hemostream("demo", "--plain", "--speed", "100", "--duration", "2400", "--every", "30",
               "--db", f"sqlite:///{db}", check_rc=0, timeout=200)
    with sqlite3.connect(db) as c:
        assert c.execute("select count(*) from alarm_events where category='technical'"
                         ).fetchone()[0] > 0
        bad = c.execute("""select a.alarm_id, a.time, b.time, b.transition
                           from alarm_events a join alarm_events b on a.alarm_id = b.alarm_id
                           where a.transition = 'raised' and b.time < a.time""").fetchall()
        unit = c.execute("select unit from beds limit 1").fetchone()[0]
    assert bad == []
    out = tmp_path / "u.html"
    hemostream("report", "--db", f"sqlite:///{db}", "--unit", unit, "--out", str(out),
               check_rc=0, timeout=200)
    html = "".join(p.read_text() for p in tmp_path.glob("*.html"))
    assert not re.search(r">\s*-\d+(\.\d+)? ?(s|min|h)\b", html)
    assert "alarm-hours -" not in html


# --------------------------------------------------------------- 7. errors, not tracebacks

@pytest.mark.parametrize("args,names,accepted", [
    (["demo", "--speed", "0", "--plain"], "--speed", "above 0"),
    (["demo", "--broker", "http://x", "--plain"], "--broker", "mqtt://host:port"),
    (["demo", "--scenario", "nosuch", "--plain"], "--scenario", "shipped"),
    (["demo", "--duration", "soon", "--plain"], "--duration", "10m"),
    (["simulate", "--scenario", "stable", "--duration", "10s", "--quiet", "--publish",
      "http://x"], "--publish", "mqtt://host:port"),
    (["report", "--db", "sqlite:///{db}", "--bed", "SDU4/bed-02", "--out", "/proc/x.html"],
     "--out", "writable"),
    (["report", "--db", "sqlite:///{db}", "--bed", "SDU4/bed-02", "--out", "x.pdf"],
     "--out", ".html"),
    (["query", "derived", "--db", "sqlite:///{db}", "--since", "yesterday"], "--since",
     "RFC 3339"),
    (["query", "derived", "--db", "sqlite:///{db}", "--limit", "-1"], "--limit", "0 or more"),
])
def test_a_wrong_argument_is_a_one_line_error(tmp_path_factory, args, names, accepted):
    base = tmp_path_factory.getbasetemp() / "errors"
    db = base / "w.db"
    if not db.exists():
        base.mkdir(exist_ok=True)
        hemostream("replay", str(EXAMPLE), "--db", f"sqlite:///{db}", check_rc=0)
    args = [a.replace("{db}", str(db)) for a in args]
    if args[0] == "demo":
        args += ["--db", f"sqlite:///{tmp_path_factory.mktemp('d')}/d.db"]
    r = hemostream(*args, timeout=60, cwd=tmp_path_factory.mktemp("cwd"))
    assert r.returncode != 0
    assert "Traceback" not in r.stderr + r.stdout
    errors = [x for x in r.stderr.splitlines() if "error" in x]
    assert len(errors) == 1, r.stderr
    assert names in errors[0] and accepted in errors[0], errors[0]


# --------------------------------------------------------------- 8. check-config

def test_check_config_reports_every_problem_at_once(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text('[broker]\nurl = "mqtt://host:notaport"\n[store]\nurl = "ftp://x"\n'
                 '[[units]]\nid = "SDU9"\nbeds = ["bed-01", "bed-01"]\n'
                 '[ingest]\nmax_payload_bytes = -3\n')
    r = hemostream("check-config", str(f))
    assert r.returncode == 1
    lines = r.stdout.splitlines()
    for key, words in (("broker.url", "port must be a number"), ("store.url", "ftp://x"),
                       ("units[0].beds[1]", "given twice"),
                       ("ingest.max_payload_bytes", "greater than 0")):
        assert any(key in x and words in x for x in lines), (key, r.stdout)
    ok = hemostream("check-config", str(ROOT / "configs" / "default.toml"))
    assert ok.returncode == 0 and ok.stdout.strip().endswith(": ok")


# --------------------------------------------------------------- 10. words and consistency

from live_fixtures import broker  # noqa: E402,F401  (a real Mosquitto for watch)


def test_caution_on_query_and_replay_output(tmp_path):
    from hemostream import CAUTION
    db = tmp_path / "w.db"
    r = hemostream("replay", str(EXAMPLE), "--db", f"sqlite:///{db}", check_rc=0)
    assert CAUTION in r.stdout.replace("\n", " ")
    for fmt in ("table", "jsonl"):
        q = hemostream("query", "alarms", "--db", f"sqlite:///{db}", "--format", fmt,
                       check_rc=0)
        assert CAUTION in q.stderr.replace("\n", " ")
        if fmt == "jsonl":           # the data stays data
            import json
            [json.loads(x) for x in q.stdout.splitlines()]


def test_watch_once_names_the_unit_warns_and_says_when_nothing_was_seen(broker, tmp_path):
    from hemostream import CAUTION
    cfg = tmp_path / "c.toml"
    cfg.write_text(f'[broker]\nurl = "{broker.url()}"\n'
                   '[[units]]\nid = "NOPE7"\nname = "Night ward seven"\nbeds = ["bed-01"]\n')
    r = hemostream("watch", "--config", str(cfg), "--unit", "NOPE7", "--once", "1.5",
                   timeout=60)
    assert r.returncode == 1
    assert "unit NOPE7 (Night ward seven)" in r.stdout
    assert CAUTION in r.stdout
    assert "no data from unit 'NOPE7' seen in 1.5 s" in r.stdout


def test_ground_truth_markers_are_not_clinical_notes():
    from rich.console import Console
    from hemostream.dashboard import Screen, UnitView, bed_screen
    v = UnitView()
    t = "2026-12-01T08:00:00Z"
    v.apply("hemo/SDU7/bed-01/derived", {"v": 1, "time": t, "values": {"SI": 0.7}})
    v.apply("hemo/SDU7/bed-01/note", {"v": 1, "time": t, "kind": "deterioration_onset"})
    v.apply("hemo/SDU7/bed-01/note", {"v": 1, "time": t, "kind": "fluid_bolus",
                                      "volume_ml": 250})
    c = Console(width=160, height=40, record=True)
    c.print(bed_screen(v, Screen(unit="SDU7", source="t"), v.beds["SDU7/bed-01"],
                       1796112000.0, 160, 40))
    text = c.export_text()
    assert "fluid_bolus 250 mL" in text and "deterioration_onset" not in text


# --------------------------------------------------------------- 9. simulate --publish counts

def test_simulate_publish_counts_acknowledged_and_says_what_failed(tmp_path):
    from live_fixtures import require_broker
    from mosquitto import Mosquitto
    require_broker()
    b = Mosquitto(tmp_path / "mosquitto").start()
    try:
        ok = hemostream("simulate", "--scenario", "stable", "--duration", "2m", "--quiet",
                        "--publish", b.url(), "--speed", "1000", check_rc=0)
        assert re_search(r"(\d+) of \1 messages acknowledged by the broker", ok.stderr)
        p = subprocess.Popen([sys.executable, "-m", "hemostream.app.cli", "simulate",
                              "--scenario", "stable", "--duration", "2h", "--quiet",
                              "--publish", b.url(), "--speed", "200", "--give-up-after", "2"],
                             cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True)
        time.sleep(4)
        b.stop()
        _, stderr = p.communicate(timeout=60)
    finally:
        b.stop()
    assert p.returncode == 1
    m = re_search(r"(\d+) of (\d+) messages acknowledged by the broker, (\d+) NOT delivered",
                  stderr)
    assert m, stderr
    acked, lines, failed = map(int, m.groups())
    assert acked + failed == lines and acked < lines
    assert "gave up" in stderr and "the rest of the recording was not sent" in stderr


def re_search(pattern: str, text: str):
    import re
    return re.search(pattern, text)


def test_compare_says_its_per_bed_day_figures_are_extrapolated():
    data = ROOT / "tests" / "data"
    r = hemostream("compare", str(data / "compare-hr.jsonl"), "--config",
                   str(data / "compare-hr-high-120.toml"), "--quiet", check_rc=0)
    line = next((x for x in r.stdout.splitlines() if "extrapolated" in x), "")
    assert "per bed-day figures are extrapolated from" in line and "bed-hour" in line


def test_a_waiting_database_shows_as_a_technical_condition_in_the_header():
    """The service's health says its database is waiting (locked or unreachable): every
    screen's header says so, beside the connection state (issue 17: no silent stall)."""
    from rich.console import Console
    from hemostream.dashboard import Screen, UnitView, unit_screen
    v = UnitView()
    v.apply("hemo/_svc/hs-1/status", {"v": 1, "kind": "health", "instance": "hs-1",
                                      "database": {"state": "waiting", "waiting_s": 42.0,
                                                   "reason": "OperationalError: locked"}})
    scr = Screen(unit="SDU7", source="test", connected=True)
    c = Console(width=160, height=30, record=True, force_terminal=True)
    c.print(unit_screen(v, scr, 1796112000.0, 160, 30))
    assert "DATABASE WAITING 42s" in c.export_text()
    v.apply("hemo/_svc/hs-1/status", {"v": 1, "kind": "health", "instance": "hs-1",
                                      "database": {"state": "ok"}})
    c = Console(width=160, height=30, record=True, force_terminal=True)
    c.print(unit_screen(v, scr, 1796112000.0, 160, 30))
    assert "DATABASE WAITING" not in c.export_text()
