"""The live pipeline over the in-process broker: the durability contract, outages, restarts,
back-pressure, the outbox, the demo command. No Mosquitto needed, real SQLite files.

The in-process broker keeps MQTT 5.0's QoS 1 and session rules (OASIS 2019, sections 4.3.2,
4.4, 4.9), so the same properties are checked here quickly and against Mosquitto in
test_live_faults.py.
"""

from __future__ import annotations

import asyncio
import json
import sqlite3
import subprocess
import sys

import pytest

from hemostream.core.config import BrokerConfig, Config
from hemostream.live.health import Health
from hemostream.live.inproc import InprocBroker, InprocTransport
from hemostream.live.mqtt import BrokerSettingsError, parse_broker_url, read_password
from hemostream.live.publish import payload_bytes
from hemostream.live.service import Outbox, Service, sqlite_synchronous
from hemostream.store import open_engine

from live_fixtures import (ROOT, live_config, obs_lines, query, repeated_identities,
                           stored_messages)


def _cfg(db: str, client: str = "hs-inproc", **broker) -> Config:
    return live_config("mqtt://unused:1", db, client, **broker)


async def _until(pred, timeout: float, what: str) -> None:
    loop = asyncio.get_running_loop()
    end = loop.time() + timeout
    while not pred():
        if loop.time() > end:
            raise AssertionError(f"timed out waiting for {what}")
        await asyncio.sleep(0.02)


class CheckingTransport(InprocTransport):
    """Asserts the contract at the moment of each acknowledgement: the message is in the
    database already (read through a separate SQLite connection: committed data only)."""

    def __init__(self, *a, db: str, **kw) -> None:
        super().__init__(*a, **kw)
        self.db = db
        self.checked = 0

    def ack(self, generation: int, mid: int, qos: int) -> bool:
        s = self._session
        if generation == self.generation and self.connected and s is not None:
            entry = s.inflight.get(mid)
            if entry is not None:
                p = json.loads(entry[1])
                con = sqlite3.connect(self.db[len("sqlite:///"):])
                try:
                    n = con.execute("SELECT count(*) FROM messages WHERE device=? AND seq=?",
                                    (p["device"], p["seq"])).fetchone()[0]
                finally:
                    con.close()
                assert n == 1, f"acknowledged {p['device']}#{p['seq']} before it was stored"
                self.checked += 1
        return super().ack(generation, mid, qos)


def test_every_acknowledgement_comes_after_the_commit(tmp_path):
    db = f"sqlite:///{tmp_path / 'ack.db'}"

    async def main():
        broker = InprocBroker()
        t = CheckingTransport(broker, "hs-ack", db=db)
        svc = Service(_cfg(db, "hs-ack", flush_messages=50), t)
        run = asyncio.create_task(svc.run())
        await svc.ready.wait()
        for ln in obs_lines(400):
            broker.publish(ln["topic"], payload_bytes(ln["payload"]))
            await asyncio.sleep(0)
        await _until(lambda: svc.health.acked == 400, 20, "400 acknowledgements")
        svc.stop()
        assert await run == 0
        return t.checked, broker.sessions["hs-ack"]

    checked, session = asyncio.run(main())
    assert checked == 400
    assert not session.inflight and not session.queue
    assert stored_messages(db) == 400


def test_outage_mid_stream_then_everything_once(tmp_path):
    db = f"sqlite:///{tmp_path / 'outage.db'}"

    async def main():
        broker = InprocBroker()
        svc = Service(_cfg(db), broker.client("hs-inproc"))
        run = asyncio.create_task(svc.run())
        await svc.ready.wait()
        lines = obs_lines(600)
        for i, ln in enumerate(lines):
            broker.publish(ln["topic"], payload_bytes(ln["payload"]))
            if i == 300:
                broker.outage()              # unacknowledged ones go back to the session
                await asyncio.sleep(0.3)
                broker.restore()
            await asyncio.sleep(0)
        await _until(lambda: stored_messages(db) >= 600 and not broker.sessions[
            "hs-inproc"].inflight, 20, "600 stored, all acknowledged")
        svc.stop()
        assert await run == 0
        return svc.health

    h = asyncio.run(main())
    assert stored_messages(db) == 600
    assert repeated_identities(db) == []
    assert h.outages == 1 and h.connects == 2


def test_restart_with_the_persistent_session_gets_what_was_sent_meanwhile(tmp_path):
    db = f"sqlite:///{tmp_path / 'restart.db'}"
    lines = obs_lines(500)
    broker = InprocBroker()

    async def run_once(part):
        svc = Service(_cfg(db), broker.client("hs-inproc"))
        run = asyncio.create_task(svc.run())
        await svc.ready.wait()
        for ln in part:
            broker.publish(ln["topic"], payload_bytes(ln["payload"]))
            await asyncio.sleep(0)
        # everything the session holds (sent now, or kept while hemostream was down) has been
        # delivered, stored and acknowledged
        session = broker.sessions["hs-inproc"]
        await _until(lambda: not session.queue and not session.inflight, 20,
                     "every message of the session stored and acknowledged")
        svc.stop()
        assert await run == 0
        return svc.health

    asyncio.run(run_once(lines[:200]))
    first = stored_messages(db)
    for ln in lines[200:]:                       # hemostream is down: the session keeps them
        broker.publish(ln["topic"], payload_bytes(ln["payload"]))
    h = asyncio.run(run_once([]))
    assert first == 200
    assert stored_messages(db) == 500 and h.stored == 300
    assert repeated_identities(db) == []


def test_back_pressure_bounds_the_window_and_sheds_nothing(tmp_path):
    db = f"sqlite:///{tmp_path / 'bp.db'}"
    high = {"inflight": 0, "queue": 0}

    async def main():
        broker = InprocBroker()
        t = broker.client("hs-bp", receive_maximum=8)
        svc = Service(_cfg(db, "hs-bp", queue_size=4, flush_messages=3), t)
        run = asyncio.create_task(svc.run())
        await svc.ready.wait()
        s = broker.sessions["hs-bp"]
        for ln in obs_lines(300):
            broker.publish(ln["topic"], payload_bytes(ln["payload"]))
        while stored_messages(db) < 300:
            high["inflight"] = max(high["inflight"], len(s.inflight))
            high["queue"] = max(high["queue"], svc.inq.qsize())
            await asyncio.sleep(0.001)
        svc.stop()
        assert await run == 0
        return svc.health

    h = asyncio.run(main())
    assert high["inflight"] <= 8 and high["queue"] <= 4
    assert sum(h.shed.values()) == 0 and h.stored == 300


def test_outbox_while_offline():
    broker = InprocBroker()
    t = broker.client("hs-ob")
    h = Health("x")
    ob = Outbox(t, h, max_events=2)
    ob.put("hemo/U/b/derived", {"v": 1}, False)             # offline: shed, counted
    for i in range(3):                                       # offline: kept, oldest dropped
        ob.put("hemo/U/b/alarm", {"v": 1, "event": i}, False)
    ob.put("hemo/U/b/alarm", {"v": 1, "state": "s1"}, True)
    ob.put("hemo/U/b/alarm", {"v": 1, "state": "s2"}, True)  # only the latest is kept
    assert h.shed == {"derived_while_offline": 1, "alarm_events_while_offline": 1}

    async def go():
        watcher = broker.client("view", persistent=False)
        await watcher.connect()
        await watcher.subscribe(["hemo/#"], 0)
        await t.connect()
        ob.online()
        got = []
        for m in watcher.leftover():
            got.append(json.loads(m.payload))
        return got

    got = asyncio.run(go())
    assert got == [{"v": 1, "event": 1}, {"v": 1, "event": 2}, {"v": 1, "state": "s2"}]
    assert broker.retained["hemo/U/b/alarm"] == b'{"v":1,"state":"s2"}'


def test_sqlite_commits_are_synced_before_acknowledging(tmp_path):
    """PRAGMA synchronous: 2 is FULL (SQLite documentation, "PRAGMA synchronous")."""
    engine = open_engine(f"sqlite:///{tmp_path / 's.db'}")
    sqlite_synchronous(engine, "full")
    with engine.connect() as c:
        assert c.exec_driver_sql("PRAGMA synchronous").scalar() == 2
        assert c.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
    engine.dispose()


def test_broker_settings():
    assert parse_broker_url("mqtts://broker.sdu9.example").port == 8883
    with pytest.raises(BrokerSettingsError):
        parse_broker_url("http://127.0.0.1")
    with pytest.raises(BrokerSettingsError):
        parse_broker_url("mqtt://u:p@127.0.0.1")
    with pytest.raises(BrokerSettingsError):
        read_password(BrokerConfig(password_env="HEMOSTREAM_TEST_SURELY_UNSET"), "u")


def test_run_without_config_uses_the_shipped_default():
    from hemostream.config import DEFAULT_CONFIG, load_config
    from hemostream.app.cli import live_config as _config
    assert _config(None) == load_config(DEFAULT_CONFIG)


def test_demo_command_runs_without_a_broker_and_says_where_the_data_is(tmp_path):
    db = f"sqlite:///{tmp_path / 'demo.db'}"
    r = subprocess.run([sys.executable, "-m", "hemostream.cli", "demo", "--speed", "200",
                        "--duration", "60", "--db", db, "--every", "0.1"], cwd=ROOT,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert "not a medical device" in r.stdout
    assert f"The data is in {db}" in r.stdout
    assert stored_messages(db) > 50
    from hemostream.store import derived_rows
    assert len(derived_rows(db)) > 0
    assert repeated_identities(db) == []


@pytest.mark.parametrize("high_s, raises", [(6, False), (16, True)])
def test_a_backlog_is_ticked_in_arrival_time_not_on_the_wall_clock(tmp_path, monkeypatch,
                                                                   high_s, raises):
    """Behind the stream, the once-a-second tick uses the arrival time of the newest message
    processed: an HR excursion shorter than its 10 s delay (IEC 60601-1-8 alarm condition
    delay, the shipped default) whose end is still queued must not raise, though the wall
    clock is already past the delay, and the feed is not silent; one longer than the delay
    raises. (On the wall clock the short one raised, and so did device_silent.)"""
    from hemostream.core.wire import format_epoch
    from hemostream.live import service as svc_mod
    from hemostream.live.transport import Incoming

    t0 = 1_796_112_000.0
    db = f"sqlite:///{tmp_path / 'b.db'}"
    cfg = _cfg(db, beds=1)
    assert cfg.rules.limits["HR"].delay_s == 10.0
    clock = {"now": t0 + 60.0}                     # 60 s behind the stream

    async def main():
        broker = InprocBroker()
        svc = Service(cfg, InprocTransport(broker, "hs-backlog"), db_url=db,
                      clock=lambda: clock["now"], log_health=False)
        svc._loop = asyncio.get_running_loop()
        engine = open_engine(db)
        await svc.prepare(engine)
        svc.inq = asyncio.Queue()
        for k in range(20):                        # HR 160 for 6 s, then 80
            hr = 160 if k < high_s else 80
            body = {"v": 1, "device": "gw-1", "seq": k, "time": format_epoch(t0 + k),
                    "obs": [{"param": "HR", "value": hr, "unit": "/min"}]}
            svc.inq.put_nowait(Incoming("hemo/SDU9/bed-01/obs", json.dumps(body).encode(),
                                        1, k + 1, 0, t0 + k + 0.05))
        svc.inq.put_nowait(svc_mod._STOP)
        ticks = iter(range(10_000))                # each look at the monotonic clock: 2 s on
        monkeypatch.setattr(svc_mod.time, "monotonic", lambda: 2.0 * next(ticks))
        await svc._process_loop()
        monkeypatch.undo()
        svc.writer.close()
        engine.dispose()
        return svc

    asyncio.run(main())
    events = query(db, "SELECT rule, transition, time FROM alarm_events")
    hr = [e[:2] for e in events if e[0].startswith("HR") and e[1] == "raised"]
    assert hr == ([("HR_high", "raised")] if raises else []), events
    # silent only by the clock at the stop (41 s after the last arrival), never before
    assert all(e[2] == t0 + 60.0 for e in events if e[0] == "device_silent"), events
