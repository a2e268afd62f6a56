"""Workers sharing units (docs/workers.md): aggregate stored msg/s with 1, 2 and 4 workers
(as a ratio to one worker, measured in the same run), and the hand-over gap (SIGKILL of a
worker to the first message stored by the new owner of one of its units), p50 and max.

    python -m benchmarks.workers                  # full: 24,000 messages, 10 kills
    python -m benchmarks.workers --quick          # 6,000 messages, 3 kills
    python -m benchmarks.workers --out benchmarks/results-workers.json

Throughput: first one plain ``hemostream run`` (no [workers], one session for every unit)
on the same database and stream, as context; then N worker processes share 12 units of 2 beds on a fresh PostgreSQL database
(``createdb``) and a Mosquitto of its own. Once every unit is claimed and subscribed the
workers are paused (SIGSTOP), the whole stream is published into their persistent sessions,
and they are resumed (SIGCONT): the figure is messages / (time from resuming to the last
one stored), so the publisher's own speed does not enter it.

Hand-over: two workers with the default lease (workers.lease_s 10 s, check_every_s 1 s)
and a steady stream (12 units x 2 beds at 2 Hz); one is SIGKILLed, and the gap runs until a
message id from the new owner's block (its lease token, hemostream.live.leases.id_base)
appears for one of the victim's units; then a replacement worker starts and the share
settles before the next kill.

The wards are invented (units B01..B12).
"""

from __future__ import annotations

import argparse
import asyncio
import json
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path

from sqlalchemy import create_engine, text

from hemostream.core.config import BrokerConfig
from hemostream.core.processor import iso
from hemostream.live.leases import MESSAGE_BLOCK
from hemostream.live.publish import publish_recording_lines

from .broker import Broker
from .machine import ROOT, child_env, load_average, machine, source_version

UNITS = [f"B{i:02d}" for i in range(1, 13)]
BEDS = ["bed-01", "bed-02"]


def config(broker_url: str, db_url: str, lease_s: float, check_s: float) -> str:
    units = "".join(f'[[units]]\nid = "{u}"\nbeds = {json.dumps(BEDS)}\n\n' for u in UNITS)
    return (f'instance = "hs-bench"\n\n{units}[store]\nurl = "{db_url}"\n\n'
            f'[broker]\nurl = "{broker_url}"\nclient_id = "hs-bench"\nkeepalive_s = 120\n'
            'reconnect_min_s = 0.1\nreconnect_max_s = 1.0\n\n'
            f'[workers]\nenabled = true\nlease_s = {lease_s}\ncheck_every_s = {check_s}\n')


def lines_for(n_messages: int, hz: float, start: float) -> list[dict]:
    per_round = len(UNITS) * len(BEDS)
    out = []
    for k in range(max(1, n_messages // per_round)):
        t = start + k / hz
        for u in UNITS:
            for b in BEDS:
                out.append({"rx": iso(t), "topic": f"hemo/{u}/{b}/obs", "payload": {
                    "v": 1, "device": f"gw-{u.lower()}-{b}", "seq": k, "time": iso(t),
                    "obs": [{"param": "HR", "value": 72 + k % 9, "unit": "/min"},
                            {"param": "ABP_SYS", "value": 120 + k % 7, "unit": "mm[Hg]"},
                            {"param": "ABP_DIA", "value": 65 + k % 5, "unit": "mm[Hg]"},
                            {"param": "CO", "value": 5.0, "unit": "L/min"}]}})
    return out


class Setup:
    """A database, a broker and worker processes; everything stopped on close."""

    def __init__(self, work: Path, lease_s: float, check_s: float) -> None:
        self.work = work
        self.db = f"hs_bench_{uuid.uuid4().hex[:10]}"
        subprocess.run(["createdb", "-h", "127.0.0.1", self.db], check=True)
        self.url = f"postgresql+psycopg://127.0.0.1:5432/{self.db}"
        self.engine = create_engine(self.url)
        self.broker = Broker(work / f"mosquitto-{self.db}").start()
        self.conf = work / f"{self.db}.toml"
        self.conf.write_text(config(self.broker.url, self.url, lease_s, check_s))
        subprocess.run([sys.executable, "-m", "hemostream.cli", "db", "upgrade", "--db",
                        self.url], cwd=ROOT, env=child_env(), check=True, capture_output=True)
        self.procs: list[subprocess.Popen] = []

    def start_worker(self) -> subprocess.Popen:
        log = open(self.work / f"{self.db}-w{len(self.procs) + 1}.log", "wb")
        p = subprocess.Popen([sys.executable, "-m", "hemostream.cli", "run", "--config",
                              str(self.conf), "--log-level", "warning"], cwd=ROOT,
                             env=child_env(), stdout=subprocess.DEVNULL, stderr=log)
        self.procs.append(p)
        return p

    def q(self, sql: str, **kw) -> list:
        with self.engine.connect() as c:
            return list(c.execute(text(sql), kw))

    def owners(self) -> dict[str, str]:
        return {u: o for u, o in self.q(
            "SELECT unit, owner FROM worker_leases "
            "WHERE expires >= extract(epoch from clock_timestamp())")}

    def stored(self) -> int:
        return int(self.q("SELECT (SELECT count(*) FROM messages WHERE kind='obs') + "
                          "(SELECT coalesce(sum(m_count), 0) FROM obs_chunks)")[0][0])

    def settle(self, n_workers: int, timeout: float = 90.0) -> None:
        """Every unit claimed, shared evenly among ``n_workers``, the sessions subscribed."""
        want = sorted([len(UNITS) // n_workers + (1 if i < len(UNITS) % n_workers else 0)
                       for i in range(n_workers)])
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            o = self.owners()
            counts = sorted({w: list(o.values()).count(w) for w in set(o.values())}.values())
            if len(o) == len(UNITS) and counts == want:
                time.sleep(3.0)      # the last claims' services rebuild and subscribe
                if self.owners() == o:
                    return
            time.sleep(0.2)
        raise RuntimeError(f"workers did not settle: {self.owners()}")

    def close(self) -> None:
        for p in self.procs:
            if p.poll() is None:
                try:
                    p.send_signal(signal.SIGCONT)
                    p.send_signal(signal.SIGTERM)
                    p.wait(30)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait(5)
        self.broker.stop()
        self.engine.dispose()
        subprocess.run(["dropdb", "-h", "127.0.0.1", "--force", self.db], check=False)


def publish(url: str, lines: list[dict], speed: float | None) -> None:
    asyncio.run(publish_recording_lines(lines, url, speed, broker=BrokerConfig(url=url),
                                        client_id=f"hs-bench-pub-{uuid.uuid4().hex[:6]}"))


def throughput(work: Path, n_workers: int, n_messages: int) -> dict:
    """``n_workers`` workers; 0: one plain ``hemostream run`` (no [workers]) as the context."""
    s = Setup(work, 120.0, 1.0)
    try:
        if n_workers == 0:
            s.conf.write_text(s.conf.read_text().replace("enabled = true", "enabled = false"))
            s.start_worker()
            time.sleep(8.0)          # started and subscribed (one session, every unit)
        else:
            for _ in range(n_workers):
                s.start_worker()
            s.settle(n_workers)
        for p in s.procs:
            p.send_signal(signal.SIGSTOP)
        lines = lines_for(n_messages, 1.0, time.time() - n_messages)
        publish(s.broker.url, lines, None)
        t0 = time.monotonic()
        for p in s.procs:
            p.send_signal(signal.SIGCONT)
        while s.stored() < len(lines):
            if time.monotonic() - t0 > 600:
                raise RuntimeError("the workers did not store the stream within 10 minutes")
            time.sleep(0.05)
        dt = time.monotonic() - t0
        return {"workers": n_workers, "messages": len(lines), "seconds": round(dt, 2),
                "msg_per_s": round(len(lines) / dt, 1)}
    finally:
        s.close()


def handover(work: Path, kills: int) -> dict:
    s = Setup(work, 10.0, 1.0)
    stop = threading.Event()
    gaps: list[float] = []
    try:
        s.start_worker()
        s.start_worker()
        s.settle(2)

        def steady() -> None:
            k = 0
            while not stop.is_set():
                batch = lines_for(len(UNITS) * len(BEDS) * 20, 2.0, time.time())
                for ln in batch:
                    ln["payload"]["seq"] += k
                k += 20
                publish(s.broker.url, batch, 1.0)

        pub = threading.Thread(target=steady, daemon=True)
        pub.start()
        time.sleep(3.0)
        host = socket.gethostname()
        for _ in range(kills):
            live = [p for p in s.procs if p.poll() is None]
            victim = live[0]
            name = f"{host}-{victim.pid}"
            held = [u for u, o in s.owners().items() if o == name]
            victim.send_signal(signal.SIGKILL)
            killed = time.monotonic()
            victim.wait(10)
            gap = None
            while gap is None and time.monotonic() - killed < 60:
                rows = s.q("SELECT l.token, b.id FROM worker_leases l JOIN beds b "
                           "ON b.unit = l.unit WHERE l.unit = ANY(:u) AND l.owner <> :n",
                           u=held, n=name)
                for token, bed in rows:
                    lo = token * MESSAGE_BLOCK
                    got = s.q("SELECT 1 FROM messages WHERE bed_id = :b AND id > :lo AND "
                              "id <= :hi LIMIT 1", b=bed, lo=lo, hi=lo + MESSAGE_BLOCK)
                    if got:
                        gap = time.monotonic() - killed
                        break
                time.sleep(0.05)
            if gap is None:
                raise RuntimeError("no new owner stored a message of the killed worker's units")
            gaps.append(round(gap, 2))
            s.start_worker()
            s.settle(2)
        stop.set()
        pub.join(30)
        return {"kills": kills, "lease_s": 10.0, "check_every_s": 1.0, "gaps_s": gaps,
                "p50_s": round(statistics.median(gaps), 2), "max_s": max(gaps)}
    finally:
        stop.set()
        s.close()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--out", type=Path)
    a = ap.parse_args(argv)
    n, kills = (6_000, 3) if a.quick else (24_000, 10)
    with tempfile.TemporaryDirectory() as d:
        work = Path(d)
        plain = throughput(work, 0, n)
        rates = [throughput(work, w, n) for w in (1, 2, 4)]
        base = rates[0]["msg_per_s"]
        for r in rates:
            r["ratio_to_one"] = round(r["msg_per_s"] / base, 2)
            r["ratio_to_plain"] = round(r["msg_per_s"] / plain["msg_per_s"], 2)
        ho = handover(work, kills)
    res = {"machine": machine(), "load_average": load_average(), "source": source_version(),
           "plain_single_process": plain, "throughput": rates, "handover": ho}
    print(json.dumps(res, indent=1))
    if a.out:
        a.out.write_text(json.dumps(res, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
