"""`hemostream watch` against a real Mosquitto and a real service: what it shows, and an
acknowledgement sent from it stored for audit."""

from __future__ import annotations

import subprocess
import sys
import time

import pytest

from hemostream.core.config import UnitConfig
from live_fixtures import (ServiceThread, broker, iso, live_config,  # noqa: F401
                           mqtt_transport, publish, query, wait_until)

UNIT = "SDU7W"      # a unit of its own: other tests leave retained alarm states on the broker

pytestmark = pytest.mark.broker


def tachycardia_lines(seconds: int = 60) -> list[dict]:
    """bed-01 at HR 150 (above the default high limit of 140 /min), bed-02 normal."""
    t0 = time.time() - seconds - 5
    out = []
    for k in range(seconds):
        t = t0 + k
        for bed, hr in (("bed-01", 150), ("bed-02", 72)):
            out.append({"rx": iso(t), "topic": f"hemo/{UNIT}/{bed}/obs", "payload": {
                "v": 1, "device": f"gw-w-{bed}", "seq": k, "time": iso(t), "obs": [
                    {"param": "HR", "value": hr, "unit": "/min"},
                    {"param": "ABP_SYS", "value": 122, "unit": "mm[Hg]"},
                    {"param": "ABP_DIA", "value": 70, "unit": "mm[Hg]"},
                    {"param": "SPO2", "value": 97, "unit": "%"}]}})
    return out


def test_watch_shows_the_unit_and_acknowledges(broker, tmp_path):
    from hemostream.app.watch import BrokerFeed

    db = f"sqlite:///{tmp_path / 'w.db'}"
    cfg = live_config(broker.url(), db, "hs-watch")
    cfg = cfg.model_copy(update={"units": [UnitConfig(id=UNIT, beds=["bed-01", "bed-02"])]})
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    feed = BrokerFeed(cfg, UNIT)
    feed.start()
    try:
        wait_until(lambda: feed.connected, 10, "the watcher connected")
        publish(tachycardia_lines(), broker.url(), None)
        wait_until(lambda: any(a.get("rule") == "HR_high" for a in
                               feed.view.bed(f"{UNIT}/bed-01").alarms), 30, "HR_high shown")
        alarm = next(a for a in feed.view.bed(f"{UNIT}/bed-01").alarms if a["rule"] == "HR_high")
        assert alarm["priority"] == "medium" and not alarm["acknowledged"]
        # a separate process shows the same unit, read-only, as text
        proc = subprocess.Popen([sys.executable, "-m", "hemostream.cli", "watch", "--broker",
                                 broker.url(), "--unit", UNIT, "--once", "4", "--size",
                                 "120x30"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True)
        # the stream goes on while it watches: keep publishing until the watcher has drawn its
        # last frame, so a slow start (imports, connect) cannot miss the live beds
        seq = 1000
        deadline = time.monotonic() + 60
        while proc.poll() is None and time.monotonic() < deadline:
            more = tachycardia_lines(1)
            for line in more:
                line["payload"]["seq"] = seq
            seq += 1
            publish(more, broker.url(), None)
            time.sleep(0.5)
        out, err = proc.communicate(timeout=60)
        r = subprocess.CompletedProcess(proc.args, proc.returncode, out, err)
        assert r.returncode == 0, r.stderr
        assert "bed-01" in r.stdout and "bed-02" in r.stdout
        assert "MEDIUM HR high" in r.stdout            # the retained alarm state, by phrase
        assert "not a medical device" in r.stdout
        # acknowledge from the dashboard's command path
        feed.send_command(f"{UNIT}/bed-01", "acknowledge", alarm["id"], "RN P. Lindqvist")
        wait_until(lambda: query(db, "SELECT result, by FROM commands"), 15, "stored command")
        assert query(db, "SELECT result, by FROM commands") == [("applied", "RN P. Lindqvist")]
        def acknowledged():      # the same alarm, found by id (others may join the bed)
            return any(a.get("id") == alarm["id"] and a.get("acknowledged")
                       for a in feed.view.bed(f"{UNIT}/bed-01").alarms)
        wait_until(acknowledged, 30, "the acknowledged state")
        acks = query(db, "SELECT by FROM alarm_events WHERE transition = 'acknowledged'")
        assert acks == [("RN P. Lindqvist",)]
    finally:
        feed.stop()
        svc.stop()
