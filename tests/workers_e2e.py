"""The workers' kill test, on any broker (tests/test_workers.py: Mosquitto, MQTT 5;
tests/test_nats.py: NATS JetStream, MQTT 3.1.1).

Three ``hemostream run`` worker processes share twelve units (one bed each) through the
leases in a PostgreSQL database of the test's own (``createdb``). A publisher sends every
bed's stream with per-device sequence numbers through the real broker; heart rate swings
across the high limit (140 /min, shortened delays) so every unit raises and clears alarms
all along. Mid-stream one worker is SIGKILLed; later a fourth one starts. At the end every
(device, seq, time) is stored exactly once, no unit shows a second ``raised`` of an alarm
still active, the dead worker's units had new owners within the lease time plus two checks,
and the three live workers hold four units each (``hemostream status --json``).
The wards and devices are invented.
"""

from __future__ import annotations

import asyncio
import json
import os
import sys
import signal
import subprocess
import threading
import time
import uuid
from collections import Counter, defaultdict
from pathlib import Path

from sqlalchemy import create_engine, text

from hemostream.core.config import BrokerConfig
from hemostream.core.processor import iso
from hemostream.live.publish import publish_recording_lines
from hemostream.store import iter_messages

from live_fixtures import ROOT, run_cli_process, wait_until

UNITS = [f"W{i:02d}" for i in range(1, 13)]
LEASE_S, CHECK_S = 3.0, 0.5
PG_HOST = "127.0.0.1"


class Database:
    """A PostgreSQL database of the test's own (createdb / dropdb)."""

    def __init__(self) -> None:
        self.name = f"hs_workers_{uuid.uuid4().hex[:10]}"
        subprocess.run(["createdb", "-h", PG_HOST, self.name], check=True)
        self.url = f"postgresql+psycopg://{PG_HOST}:5432/{self.name}"
        self.engine = create_engine(self.url)

    def rows(self, sql: str) -> list:
        try:
            with self.engine.connect() as c:
                return list(c.execute(text(sql)))
        except Exception:  # noqa: BLE001 - tables not made yet
            return []

    def drop(self) -> None:
        self.engine.dispose()
        subprocess.run(["dropdb", "-h", PG_HOST, "--force", self.name], check=False)


def config_text(broker_url: str, db_url: str, protocol: str) -> str:
    units = "".join(f'[[units]]\nid = "{u}"\nbeds = ["bed-01"]\n\n' for u in UNITS)
    return (f'instance = "hs-wk"\n\n{units}'
            f'[store]\nurl = "{db_url}"\n\n'
            f'[broker]\nurl = "{broker_url}"\nclient_id = "hs-wk"\nprotocol = "{protocol}"\n'
            'health_every_s = 1.0\nreconnect_min_s = 0.1\nreconnect_max_s = 0.5\n'
            'flush_every_s = 0.05\n\n'
            f'[workers]\nenabled = true\nlease_s = {LEASE_S}\ncheck_every_s = {CHECK_S}\n\n'
            '[rules.limits.HR]\nlow = 40.0\nhigh = 140.0\ndelay_s = 1.0\n'
            'clear_delay_s = 1.0\nlatching = false\n')


def stream(seconds: float, hz: float, start: float) -> list[dict]:
    """Every unit's bed at ``hz``: HR 165 for 3 s then 80 for 3 s (raises and clears)."""
    out = []
    n = int(seconds * hz)
    for k in range(n):
        t = start + k / hz
        hr = 165 if (t - start) % 6 < 3 else 80
        for u in UNITS:
            out.append({"rx": iso(t), "topic": f"hemo/{u}/bed-01/obs", "payload": {
                "v": 1, "device": f"gw-{u.lower()}-bed-01", "seq": k, "time": iso(t),
                "obs": [{"param": "HR", "value": hr, "unit": "/min"},
                        {"param": "ABP_SYS", "value": 121, "unit": "mm[Hg]"},
                        {"param": "ABP_DIA", "value": 66, "unit": "mm[Hg]"}]}})
    return out


class Worker:
    def __init__(self, conf: Path, log: Path) -> None:
        self.log = log
        self.proc = run_cli_process(["run", "--config", str(conf), "--log-level", "info"],
                                    log_path=log)

    def owner_name(self) -> str:
        import socket
        return f"{socket.gethostname()}-{self.proc.pid}"


def owners(db: Database) -> dict[str, str]:
    """unit -> owner of the live leases."""
    return {u: o for u, o in db.rows(
        "SELECT unit, owner FROM worker_leases "
        "WHERE expires >= extract(epoch from clock_timestamp())")}


def duplicate_raises(db: Database) -> list[tuple]:
    """(bed, alarm id) raised again while still raised (no condition end between)."""
    active: dict[tuple, bool] = {}
    bad = []
    for bed, aid, tr in db.rows("SELECT bed_id, alarm_id, transition FROM alarm_events "
                                "ORDER BY time, id"):
        key = (bed, aid)
        if tr == "raised":
            if key in active:
                bad.append(key)
            active[key] = True
    return bad


def run_kill_test(tmp_path: Path, broker_url: str, protocol: str) -> dict:
    db = Database()
    workers: list[Worker] = []
    try:
        conf = tmp_path / "workers.toml"
        conf.write_text(config_text(broker_url, db.url, protocol))
        up = subprocess.run([sys.executable, "-m", "hemostream.cli", "db", "upgrade", "--db",
                             db.url], cwd=ROOT, capture_output=True, text=True, timeout=120)
        assert up.returncode == 0, up.stderr
        for i in range(3):
            workers.append(Worker(conf, tmp_path / f"w{i + 1}.log"))
        logs = lambda: "\n".join(w.log.read_text(errors="replace")[-3000:] for w in workers)  # noqa: E731
        # every worker holds its share before the stream starts (a worker that started
        # slower than the others takes its share from them a check or two later)
        wait_until(lambda: len(owners(db)) == 12
                   and sorted(Counter(owners(db).values()).values()) == [4, 4, 4], 60,
                   f"12 units claimed, 4 by each worker\n{owners(db)}\n{logs()}")
        # the units' services subscribe once claimed: their sessions must exist before the
        # publisher starts (what is published before a subscription exists is not kept)
        wait_until(lambda: sum(w.log.read_text(errors="replace").count(
            "connected to the broker") for w in workers) >= 12, 30, f"subscribed\n{logs()}")
        time.sleep(0.5)
        lines = stream(14.0, 5.0, time.time())
        pub_cfg = BrokerConfig(url=broker_url, protocol=protocol)  # type: ignore[arg-type]
        summary: dict = {}

        def publish() -> None:
            summary["r"] = asyncio.run(publish_recording_lines(
                lines, broker_url, 1.0, broker=pub_cfg, client_id="hs-wk-publisher"))

        pub = threading.Thread(target=publish, daemon=True)
        pub.start()
        time.sleep(4.0)
        victim = workers[0]
        held = {u for u, o in owners(db).items() if o == victim.owner_name()}
        assert held, f"the first worker held no unit: {owners(db)}\n{logs()}"
        victim.proc.send_signal(signal.SIGKILL)
        killed = time.monotonic()
        victim.proc.wait(10)
        moved = None
        while time.monotonic() - killed < LEASE_S + 10:
            now_owners = owners(db)
            if all(now_owners.get(u) not in (None, victim.owner_name()) for u in held):
                moved = time.monotonic() - killed
                break
            time.sleep(0.1)
        assert moved is not None, f"units {sorted(held)} not taken over\n{logs()}"
        time.sleep(2.0)
        workers.append(Worker(conf, tmp_path / "w4.log"))
        pub.join(60)
        assert not pub.is_alive(), "publisher did not finish"
        wait_until(lambda: _count(db) >= len(lines), 60,
                   f"all {len(lines)} messages stored (have {_count(db)})\n{logs()}")
        live = [w for w in workers if w is not victim]
        wait_until(lambda: sorted(Counter(owners(db).values()).values()) == [4, 4, 4], 30,
                   f"an even share {Counter(owners(db).values())}\n{logs()}")
        st = subprocess.run([sys.executable, "-m", "hemostream.cli", "status", "--db",
                             db.url, "--json"], cwd=ROOT, capture_output=True, text=True,
                            timeout=60)
        assert st.returncode == 0, st.stderr
        status = json.loads(st.stdout)
        for w in live:
            w.proc.send_signal(signal.SIGTERM)
        for w in live:
            assert w.proc.wait(60) == 0, logs()
        msgs = [m for m in iter_messages(db.engine, "obs")]
        idents = Counter((m["device"], m["seq"], m["time"]) for m in msgs)
        sent = {(ln["payload"]["device"], ln["payload"]["seq"]) for ln in lines}
        per_unit_raises = defaultdict(int)
        for (aid,) in db.rows("SELECT alarm_id FROM alarm_events WHERE transition='raised'"):
            per_unit_raises[aid.split("@")[1].split("/")[0]] += 1
        return {"lines": lines, "idents": idents, "sent": sent, "moved_s": moved,
                "held": held, "status": status, "dup_raises": duplicate_raises(db),
                "raises": per_unit_raises, "victim": victim.owner_name(),
                "live": [w.owner_name() for w in live]}
    finally:
        for w in workers:
            if w.proc.poll() is None:
                w.proc.kill()
                w.proc.wait(10)
        db.drop()


def _count(db: Database) -> int:
    r = db.rows("SELECT (SELECT count(*) FROM messages WHERE kind='obs') + "
                "(SELECT coalesce(sum(m_count), 0) FROM obs_chunks)")
    return int(r[0][0]) if r else 0


def check(result: dict) -> None:
    idents = result["idents"]
    assert max(idents.values()) == 1, [k for k, n in idents.items() if n > 1][:5]
    got = {(d, s) for d, s, _t in idents}
    assert got == result["sent"], (len(result["sent"] - got), len(got - result["sent"]))
    assert result["dup_raises"] == [], result["dup_raises"][:5]
    # every unit raised alarms (HR above 140 for 3 s every 6 s), its owner changing or not
    assert set(result["raises"]) == set(UNITS)
    # the lease runs out, then the next check of a live worker (and of its count of live
    # workers) claims: lease + two checks, plus slack for a loaded 2-core machine
    assert result["moved_s"] <= LEASE_S + 2 * CHECK_S + 4.0, result["moved_s"]
    st = result["status"]
    held = Counter(r["owner"] for r in st["leases"] if r["live"])
    assert sorted(held.values()) == [4, 4, 4] and set(held) == set(result["live"]), held
    assert result["victim"] not in {m["name"] for m in st["workers"]}
