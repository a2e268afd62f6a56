"""The live service against a real Mosquitto: end to end, outputs, bad input, commands.

Expected behaviour is that of MQTT 5.0 (OASIS Standard, 2019): QoS 1 delivers at least once
(section 4.3.2), retained messages go to new subscribers (section 3.3.1.3), the last will is
published when a connection ends without DISCONNECT (section 3.1.2.5).
"""

from __future__ import annotations

import json
import time

import pytest

from live_fixtures import (UNIT, ServiceThread, Subscriber, broker, live_config,  # noqa: F401
                           mqtt_transport, obs_lines, publish, query, repeated_identities,
                           stored_messages, wait_until)

pytestmark = pytest.mark.broker


def test_end_to_end_every_message_stored_once_and_outputs_published(broker, tmp_path):
    db = f"sqlite:///{tmp_path / 'e2e.db'}"
    cfg = live_config(broker.url(), db, "hs-e2e")
    sub = Subscriber(broker.ports["anon"], [f"hemo/{UNIT}/+/derived", "hemo/_svc/hs-e2e/status"])
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    try:
        lines = obs_lines(600, beds=3)
        # the at-least-once publisher may resend; send a third of the stream twice on purpose
        summary = publish(lines + lines[:200], broker.url(), None)
        assert summary.published == 800
        wait_until(lambda: stored_messages(db) >= 600, 30, "600 stored messages")
        wait_until(lambda: svc.svc.health.stored >= 800, 30, "every delivery committed")
        time.sleep(0.3)
        assert stored_messages(db) == 600
        assert repeated_identities(db) == []
        assert query(db, "SELECT count(*) FROM observations")[0][0] == 600 * 6
        assert svc.svc.health.duplicates == 200
        wait_until(lambda: sub.payloads("/derived"), 10, "derived values published")
        d = sub.payloads("/derived")[-1]
        assert d["v"] == 1 and "values" in d
        wait_until(lambda: any(p.get("kind") == "health" for p in sub.payloads("/status")),
                   10, "a health message")
        health = [p for p in sub.payloads("/status") if p.get("kind") == "health"][-1]
        for key in ("messages_per_s", "lag_s", "rejected_total", "queue", "db_write_ms",
                    "shed_total"):
            assert key in health
        assert health["shed_total"] == 0
    finally:
        code = svc.stop()
        sub.close()
    assert code == 0
    # the retained status says offline after a clean stop
    late = Subscriber(broker.ports["anon"], ["hemo/_svc/hs-e2e/status"])
    try:
        wait_until(lambda: late.payloads("/status"), 10, "the retained status")
        st = late.payloads("/status")[-1]
        assert st["kind"] == "status" and st["state"] == "offline" and st["reason"] == "stopped"
    finally:
        late.close()


def test_map_published_matches_the_textbook_estimate(broker, tmp_path):
    """MAP estimate DBP + (SBP - DBP) / 3 (common practice, see shared references) for a bed
    with only systolic and diastolic invasive pressure."""
    db = f"sqlite:///{tmp_path / 'map.db'}"
    cfg = live_config(broker.url(), db, "hs-map", beds=1)
    sub = Subscriber(broker.ports["anon"], [f"hemo/{UNIT}/bed-01/derived"])
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    try:
        t = time.time()
        msg = {"v": 1, "device": "gw-map", "seq": 1, "time": _iso(t), "obs": [
            {"param": "ABP_SYS", "value": 120, "unit": "mm[Hg]"},
            {"param": "ABP_DIA", "value": 60, "unit": "mm[Hg]"}]}
        publish([{"rx": _iso(t), "topic": f"hemo/{UNIT}/bed-01/obs", "payload": msg}],
                broker.url(), None)
        wait_until(lambda: any("MAP" in p.get("values", {}) for p in sub.payloads("/derived")),
                   10, "a published MAP")
        m = [p for p in sub.payloads("/derived") if "MAP" in p.get("values", {})][-1]
        assert m["values"]["MAP"] == pytest.approx(60 + (120 - 60) / 3)
    finally:
        svc.stop()
        sub.close()


def test_malformed_and_oversized_messages_are_stored_as_rejects_and_service_goes_on(
        broker, tmp_path):
    db = f"sqlite:///{tmp_path / 'bad.db'}"
    cfg = live_config(broker.url(), db, "hs-bad")
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    try:
        t = time.time()
        big = json.dumps({"v": 1, "pad": "x" * (300 * 1024)})      # over 256 KiB
        bad = [
            {"rx": _iso(t), "topic": f"hemo/{UNIT}/bed-01/obs", "payload": "{not json"},
            {"rx": _iso(t), "topic": f"hemo/{UNIT}/bed-01/obs", "payload": big},
            {"rx": _iso(t), "topic": f"hemo/{UNIT}/bed-02/obs",
             "payload": {"v": 2, "device": "gw", "seq": 1, "time": _iso(t),
                         "obs": [{"param": "HR", "value": 80, "unit": "/min"}]}},
            {"rx": _iso(t), "topic": f"hemo/{UNIT}/bed-09/obs",      # bed not configured
             "payload": obs_lines(1)[0]["payload"]},
            {"rx": _iso(t), "topic": f"hemo/{UNIT}/bed-01/note",
             "payload": {"v": 1, "time": _iso(t), "kind": "fluid_bolus"}},  # no volume
        ]
        publish(bad, broker.url(), None)
        good = obs_lines(30, beds=3)
        publish(good, broker.url(), None)
        wait_until(lambda: stored_messages(db) >= 30, 20, "the good messages after the bad")
        wait_until(lambda: len(query(db, "SELECT id FROM rejected")) >= 5, 20, "5 rejects")
        cats = sorted(r[0] for r in query(db, "SELECT category FROM rejected"))
        assert cats == sorted(["invalid_json", "too_large", "bad_version",
                               "bed_not_configured", "bad_field"]), cats
        size, raw_len = query(db, "SELECT size, length(raw) FROM rejected "
                                  "WHERE category='too_large'")[0]
        assert size == len(big.encode()) and raw_len == 64 * 1024   # first 64 KiB kept
        assert svc.svc.fatal is None
    finally:
        assert svc.stop() == 0


def test_ack_command_is_stored_for_audit(broker, tmp_path):
    """`hemostream ack` waits for the service's word: applied (exit 0), refused (exit 1, the
    reason), or nobody answered (exit 1)."""
    from live_fixtures import ROOT, PY
    import subprocess
    db = f"sqlite:///{tmp_path / 'cmd.db'}"

    def ack(*extra: str, wait: str = "10") -> subprocess.CompletedProcess:
        return subprocess.run([PY, "-m", "hemostream.cli", "ack", "--bed", f"{UNIT}/bed-02",
                               "--by", "nurse-k", "--broker", broker.url(), "--wait", wait,
                               *extra], cwd=ROOT, capture_output=True, text=True, timeout=60)

    r = ack("--alarm", "HR_high", wait="2")                 # no service is running yet
    assert r.returncode == 1 and "no hemostream service" in r.stderr, r.stderr
    cfg = live_config(broker.url(), db, "hs-cmd")
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    try:
        t0 = time.time() - 40                # HR 150 for 30 s: over the 140 /min high limit
        lines = [{"rx": _iso(t0 + k), "topic": f"hemo/{UNIT}/bed-02/obs", "payload": {
            "v": 1, "device": "gw-sdu9-bed-02", "seq": 900 + k, "time": _iso(t0 + k),
            "obs": [{"param": "HR", "value": 150, "unit": "/min"}]}} for k in range(30)]
        publish(lines, broker.url(), None)
        wait_until(lambda: query(db, "SELECT 1 FROM alarm_events WHERE rule = 'HR_high' AND "
                                     "transition = 'raised'"), 20, "HR_high raised")
        r = ack("--alarm", "MAP_LOW")                       # no such alarm on the bed
        assert r.returncode == 1 and "not applied" in r.stderr, r.stderr
        r = ack("--alarm", "HR_high")
        assert r.returncode == 0 and "applied" in r.stdout, r.stderr
        r = ack("--alarm", "HR_high", "--pause-audio")
        assert r.returncode == 0, r.stderr
        rows = query(db, "SELECT action, alarm, by, result FROM commands ORDER BY id")
        assert [r[:3] for r in rows] == [("acknowledge", "MAP_LOW", "nurse-k"),
                                         ("acknowledge", "HR_high", "nurse-k"),
                                         ("pause_audio", "HR_high", "nurse-k")]
        assert rows[0][3].startswith("not applied") and rows[1][3] == "applied"
    finally:
        svc.stop()


def test_demo_through_a_real_broker(broker, tmp_path):
    import subprocess
    import sys

    from live_fixtures import ROOT
    db = f"sqlite:///{tmp_path / 'demo.db'}"
    r = subprocess.run([sys.executable, "-m", "hemostream.cli", "demo", "--broker",
                        broker.url(), "--speed", "200", "--duration", "40", "--db", db,
                        "--every", "0.2"], cwd=ROOT, capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr
    assert f"through {broker.url()}" in r.stdout and f"The data is in {db}" in r.stdout
    assert stored_messages(db) > 20
    assert repeated_identities(db) == []


def _iso(t: float) -> str:
    from hemostream.core.processor import iso
    return iso(t)
