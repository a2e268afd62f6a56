"""Faults with a real Mosquitto: broker restart, hemostream killed hard, graceful shutdown.

What must hold comes from MQTT 5.0 (OASIS Standard, 2019): with QoS 1 a message is delivered
at least once (section 4.3.2); a session that is kept (Clean Start 0, Session Expiry
Interval > 0, section 3.1.2.4 and 3.1.2.11.2) holds the messages for an absent client; after
a reconnect the broker resends every unacknowledged message (section 4.4). hemostream adds
the rest: acknowledge only after the commit, drop the repeats by wire format identity.
"""

from __future__ import annotations

import re
import signal
import threading
import time

import pytest

from live_fixtures import (UNIT, ServiceThread, Subscriber, broker, live_config,  # noqa: F401
                           mqtt_transport, obs_lines, own_broker, publish,
                           repeated_identities, run_cli_process, stored_messages,
                           wait_until, write_toml)

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def _publish_in_thread(lines, url, speed=1.0):
    box = {}

    def go():
        try:
            box["summary"] = publish(lines, url, speed)
        except BaseException as e:  # noqa: BLE001
            box["error"] = e

    th = threading.Thread(target=go, daemon=True)
    th.start()
    return th, box


def test_broker_restart_mid_stream_loses_nothing_and_stores_nothing_twice(own_broker,
                                                                          tmp_path):
    b = own_broker
    db = f"sqlite:///{tmp_path / 'restart.db'}"
    cfg = live_config(b.url(), db, "hs-restart")
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    try:
        n = 900
        th, box = _publish_in_thread(obs_lines(n, step_s=0.004), b.url())   # about 3.6 s
        wait_until(lambda: stored_messages(db) >= 150, 20, "the stream to be under way")
        b.restart()                         # SIGTERM: Mosquitto saves its sessions, restarts
        at_restart = stored_messages(db)
        th.join(60)
        assert "error" not in box, box.get("error")
        assert box["summary"].published == n
        wait_until(lambda: stored_messages(db) >= n, 30, f"{n} stored messages")
        time.sleep(0.5)                     # a late duplicate would show up now
        assert stored_messages(db) == n
        assert repeated_identities(db) == []
        h = svc.svc.health
        assert h.outages >= 1 and h.connects >= 2
        assert 0 < at_restart < n, "the restart was not in the middle of the stream"
        assert svc.svc.t.session_present, "the broker did not keep hemostream's session"
    finally:
        assert svc.stop() == 0


def test_killed_hard_mid_stream_then_restarted_stores_every_message(broker, tmp_path):
    db = f"sqlite:///{tmp_path / 'kill.db'}"
    conf = write_toml(tmp_path / "kill.toml", broker.url(), db, "hs-kill")
    status = Subscriber(broker.ports["anon"], ["hemo/_svc/hs-kill/status"])
    log1 = tmp_path / "run1.log"
    p = run_cli_process(["run", "--config", str(conf)], log_path=log1)
    try:
        wait_until(lambda: "connected to the broker" in log1.read_text(), 20, "run to connect")
        n = 1200
        th, box = _publish_in_thread(obs_lines(n, step_s=0.003), broker.url())  # about 3.6 s
        wait_until(lambda: stored_messages(db) >= 200, 20, "the stream to be under way")
        p.send_signal(signal.SIGKILL)
        p.wait(10)
        at_kill = stored_messages(db)
        th.join(60)
        assert "error" not in box, box.get("error")
        assert box["summary"].published == n
        # the will: the broker says offline, connection lost
        wait_until(lambda: any(s.get("state") == "offline" for s in status.payloads("/status")),
                   15, "the last will")
        assert [s for s in status.payloads("/status") if s.get("state") == "offline"][-1][
            "reason"] == "connection lost"
        not_stored_while_down = n - at_kill
        assert not_stored_while_down > 0
        log2 = tmp_path / "run2.log"
        p = run_cli_process(["run", "--config", str(conf)], log_path=log2)
        wait_until(lambda: stored_messages(db) >= n, 40, f"all {n} messages after the restart")
        time.sleep(0.5)
        assert stored_messages(db) == n, "lost or extra messages"
        assert repeated_identities(db) == []
        print(f"\nSIGKILL test: {at_kill} stored before the kill, {not_stored_while_down} "
              f"delivered from the persistent session after the restart, 0 lost")
        assert "session resumed" in log2.read_text() or "(resumed session)" in log2.read_text()
    finally:
        if p.poll() is None:
            p.send_signal(signal.SIGTERM)
            p.wait(30)
        status.close()


def test_graceful_shutdown_leaves_no_unflushed_rows(broker, tmp_path):
    db = f"sqlite:///{tmp_path / 'term.db'}"
    conf = write_toml(tmp_path / "term.toml", broker.url(), db, "hs-term")
    log1 = tmp_path / "run1.log"
    p = run_cli_process(["run", "--config", str(conf)], log_path=log1)
    try:
        wait_until(lambda: "connected to the broker" in log1.read_text(), 20, "run to connect")
        n = 900
        th, box = _publish_in_thread(obs_lines(n, step_s=0.003), broker.url())
        wait_until(lambda: stored_messages(db) >= 150, 20, "the stream to be under way")
        p.send_signal(signal.SIGTERM)
        assert p.wait(30) == 0
        text = log1.read_text()
        m = re.search(r"stopped: (\d+) message\(s\) received, (\d+) stored, (\d+) duplicate",
                      text)
        assert m, text[-2000:]
        received, stored, dups = map(int, m.groups())
        # every message the service counted as stored is in the file, nothing more
        assert stored_messages(db) == stored - dups
        assert stored <= received
        th.join(60)
        assert box["summary"].published == n
        # the rest waited in the broker (never acknowledged): a restart stores it, once
        p = run_cli_process(["run", "--config", str(conf)], log_path=tmp_path / "run2.log")
        wait_until(lambda: stored_messages(db) >= n, 40, f"all {n} messages")
        time.sleep(0.5)
        assert stored_messages(db) == n
        assert repeated_identities(db) == []
    finally:
        if p.poll() is None:
            p.send_signal(signal.SIGTERM)
            assert p.wait(30) == 0
