"""The four figures. Each returns a dict: measured, baseline, ratio, target, pass, details.

Every figure is measured against a baseline taken in the same run, on the same machine:

1. replay   ``hemostream replay`` of a 200-bed recording, whole process (start-up included),
            against bare pydantic validation of the same lines, also a whole process.
2. broker   messages per second that ``hemostream run`` stores from a real Mosquitto at
            QoS 1, against a bare aiomqtt subscriber that only counts, with the same broker
            settings and the same publisher run; zero loss counted in the database.
3. latency  publish-to-alarm-event time at 2,000 messages per second (2,000 beds at 1 Hz):
            the publisher stamps the publish time into the message's ``time`` field, a
            subscriber of the ``alarm`` topic notes when each event arrives. Baseline: the
            same stream's publish-to-delivery time to a bare subscriber, over the same
            stretch of the stream as the alarm events.
4. scale    per-message cost and peak RSS at several bed counts with 30-minute trend
            windows, after a fill phase that fills the windows and the duplicate memory;
            against the smallest bed count (and against 10-minute windows).
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import time
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Callable

from . import make_load
from .broker import Broker
from .machine import PY, ROOT, child_env, load_average, remove_db, run_measured

Log = Callable[[str], None]


@dataclass(frozen=True)
class Sizes:
    """How big each figure's run is (full, quick and the test suite's smoke run)."""

    name: str
    # 1. replay
    replay_beds: int = 200
    replay_seconds: int = 600
    repeats: int = 2
    # 2. broker
    broker_beds: int = 2000
    broker_rounds: int = 30
    publishers: int = 1
    #: Mosquitto's max_inflight_messages (None: its default, 20)
    broker_max_inflight: int | None = None
    # 3. latency
    latency_beds: int = 2000
    latency_rate: float = 2000.0
    latency_seconds: float = 45.0
    latency_alarm_every: int = 10
    latency_cycle_s: float = 30.0
    latency_high_s: float = 15.0
    latency_spread_s: float = 30.0
    #: None: the shipped HR limit (delay 10 s); a number replaces the limits (smoke only)
    latency_hr_delay_s: float | None = None
    # 4. scale
    scale_beds: tuple[int, ...] = (100, 500, 2000, 5000)
    #: trend windows (rules.trends.window_s); both must hold min_points x bucket_s (180 s)
    scale_window_s: int = 1800
    scale_short_window_s: int = 600
    scale_fill_every: int = 4
    #: measured phase: at least this many seconds and this many messages (the replay reports
    #: progress every 2,000 lines, which is the timing resolution)
    scale_measure_s: int = 30
    scale_measure_messages: int = 30000
    #: the bed count whose peak RSS is held to the limit
    rss_beds: int = 2000
    #: the bed count run a second time with the fill phase's rows stored (0: not run)
    db_growth_beds: int = 500


FULL = Sizes("full")
QUICK = Sizes("quick", replay_beds=200, replay_seconds=60, repeats=1,
              broker_beds=2000, broker_rounds=5,
              latency_seconds=22.0, latency_spread_s=8.0,
              scale_beds=(25, 50, 100, 200), scale_window_s=600, scale_short_window_s=300,
              scale_fill_every=5, scale_measure_s=20, scale_measure_messages=4000,
              rss_beds=0, db_growth_beds=100)
SMOKE = Sizes("smoke", replay_beds=20, replay_seconds=20, repeats=1,
              broker_beds=20, broker_rounds=20,
              latency_beds=50, latency_rate=100.0, latency_seconds=6.0,
              latency_alarm_every=5, latency_cycle_s=4.0, latency_high_s=3.0,
              latency_spread_s=1.0, latency_hr_delay_s=1.0,
              scale_beds=(10, 20), scale_window_s=360, scale_short_window_s=180,
              scale_fill_every=6, scale_measure_s=10, scale_measure_messages=4000,
              rss_beds=0, db_growth_beds=10)
SIZES = {s.name: s for s in (FULL, QUICK, SMOKE)}

TARGETS = {
    "replay_ratio": 0.25,        # issue 7: at least 0.25 of bare validation
    "broker_ratio": 0.9,         # issue 7: at least 0.9 of a bare counting subscriber
    "latency_p99_ms": 100.0,     # issue 7: p99 under 100 ms at 2,000 messages/s
    "cost_growth": 1.25,         # "flat": at most 25 % dearer per message (project choice)
    "rss_mb": 500.0,             # issue 7: under 500 MB at 2,000 beds, 30-minute windows
}


# --------------------------------------------------------------------------- helpers

def hemostream_cmd(*args: str) -> list[str]:
    return [PY, "-m", "hemostream.cli", *args]


def sqlite_url(p: Path) -> str:
    return f"sqlite:///{p}"


def write_config(path: Path, db: Path, *, broker_url: str | None = None,
                 client_id: str = "hemostream-bench", window_s: float | None = None,
                 hr_delay_s: float | None = None) -> Path:
    """A hemostream configuration for one figure: every unit, default rules, SQLite file."""
    text = f'instance = "{client_id}"\n\n[store]\nurl = "{sqlite_url(db)}"\n'
    if broker_url:
        text += (f'\n[broker]\nurl = "{broker_url}"\nclient_id = "{client_id}"\n'
                 'health_every_s = 5.0\n')
    if window_s is not None:
        text += f"\n[rules.trends]\nwindow_s = {float(window_s)}\n"
    if hr_delay_s is not None:
        # the smoke run only: its stream is too short for the shipped 10 s condition delay.
        # (a [rules.limits] table replaces the shipped set, so this keeps only HR's limits)
        text += ("\n[rules.limits.HR]\nlow = 40.0\nhigh = 140.0\n"
                 f"delay_s = {float(hr_delay_s)}\nhysteresis = 3.0\nclear_delay_s = 1.0\n")
    path.write_text(text)
    return path


def db_query(db: Path, sql: str, *args) -> list[tuple]:
    if not db.exists():
        return []
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=10)
    try:
        return con.execute(sql, args).fetchall()
    except sqlite3.OperationalError:        # tables not created yet
        return []
    finally:
        con.close()


def stored_count(db: Path) -> int:
    """The newest stored message id (messages still in the table, or in sealed chunks)."""
    r = db_query(db, "SELECT max(id) FROM messages")
    c = db_query(db, "SELECT max(mid_max) FROM obs_chunks")
    return max(r[0][0] or 0 if r else 0, c[0][0] or 0 if c else 0)


def obs_messages(db: Path) -> list[dict]:
    """Every stored obs message (hemostream.store.iter_messages: table and sealed chunks)."""
    from sqlalchemy import create_engine

    from hemostream.store import iter_messages
    engine = create_engine(f"sqlite:///{db}")
    try:
        return list(iter_messages(engine, "obs"))
    finally:
        engine.dispose()


def loss_check(db: Path, expected_obs: int) -> dict:
    """Obs messages stored once each? ``lost`` and ``stored_twice`` must both be 0."""
    msgs = obs_messages(db)
    total = len(msgs)
    distinct = len({(m["device"], m["seq"], m["time"]) for m in msgs})
    rejected = db_query(db, "SELECT count(*) FROM rejected")[0][0]
    return {"expected": expected_obs, "stored": total, "lost": expected_obs - distinct,
            "stored_twice": total - distinct, "rejected": rejected}


def parse_time(s: str) -> float:
    return datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp()


def percentile(xs: list[float], q: float) -> float:
    """Nearest-rank percentile (q in 0..100) of a non-empty list."""
    s = sorted(xs)
    k = max(0, min(len(s) - 1, int(-(-q * len(s) // 100)) - 1))
    return s[k]


class Service:
    """``hemostream run --config FILE`` in its own process, stopped with SIGTERM."""

    def __init__(self, cfg: Path, log_path: Path) -> None:
        self.log_path = log_path
        self._err = open(log_path, "wb")
        self.proc = subprocess.Popen(hemostream_cmd("run", "--config", str(cfg)), cwd=ROOT,
                                     env=child_env(), stdout=subprocess.DEVNULL,
                                     stderr=self._err)

    def log(self) -> str:
        try:
            return self.log_path.read_text(errors="replace")
        except OSError:
            return ""

    def wait_connected(self, timeout: float = 60.0) -> None:
        deadline = time.monotonic() + timeout
        while "connected to the broker" not in self.log():
            if self.proc.poll() is not None:
                raise RuntimeError(f"hemostream run exited with {self.proc.returncode}:\n"
                                   f"{self.log()[-3000:]}")
            if time.monotonic() > deadline:
                raise RuntimeError("hemostream run did not connect:\n" + self.log()[-3000:])
            time.sleep(0.05)

    def stop(self, timeout: float = 120.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self._err.close()
        return self.proc.returncode

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)
        self._err.close()


def spawn(module: str, *args: str) -> subprocess.Popen:
    return subprocess.Popen([PY, "-m", module, *args], cwd=ROOT, env=child_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def wait_ready(p: subprocess.Popen, what: str, timeout: float = 30.0) -> None:
    line = p.stdout.readline().strip()          # the children print "ready" first
    if line != "ready":
        p.kill()
        raise RuntimeError(f"{what} did not start: {line} {p.stderr.read()[-2000:]}")


def last_json(p: subprocess.Popen, what: str, timeout: float) -> dict:
    try:
        out, err = p.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        p.kill()
        out, err = p.communicate()
        raise RuntimeError(f"{what} did not finish in {timeout:.0f} s: {err[-2000:]}")
    lines = [ln for ln in out.splitlines() if ln.startswith("{")]
    if p.returncode != 0 or not lines:
        raise RuntimeError(f"{what} failed ({p.returncode}): {err[-2000:]}")
    return json.loads(lines[-1])


def publishers(url: str, n: int, *args: str) -> list[subprocess.Popen]:
    start_at = time.time() + 2.0        # every process connected and admitted by then
    return [spawn("benchmarks.publisher", "--url", url, "--part", f"{k}/{n}",
                  "--start-at", f"{start_at:.3f}", *args) for k in range(n)]


def publisher_rate(results: list[dict]) -> float:
    obs = sum(r["acknowledged"] - r["admits"] for r in results)
    t0 = min(r["t_start"] for r in results)
    t1 = max(r["t_last_ack"] for r in results)
    return obs / (t1 - t0) if t1 > t0 else 0.0


def _pass(ok: bool | None) -> bool | None:
    return None if ok is None else bool(ok)


# --------------------------------------------------------------------------- 1. replay

def fig_replay(work: Path, sz: Sizes, log: Log) -> dict:
    rec = work / "replay.jsonl"
    lines = make_load.write(str(rec), sz.replay_beds, sz.replay_seconds)
    empty = work / "empty.jsonl"
    empty.write_text("")
    db = work / "replay.db"
    base, pipe = [], []
    for k in range(sz.repeats):
        log(f"replay: bare validation, run {k + 1} of {sz.repeats}")
        base.append(run_measured([PY, "-m", "benchmarks.validate_lines", str(rec)]).check())
        remove_db(db)
        log(f"replay: hemostream replay, run {k + 1} of {sz.repeats}")
        m = run_measured(hemostream_cmd("replay", str(rec), "--db", sqlite_url(db),
                                        "--json")).check()
        pipe.append((m, json.loads(m.stdout)))
    db_bytes = sum(os.path.getsize(f) for f in (db, Path(f"{db}-wal")) if f.exists())
    remove_db(db)
    start = run_measured(hemostream_cmd("replay", str(empty), "--db", sqlite_url(db),
                                        "--json")).check()
    remove_db(db)
    b = min(base, key=lambda m: m.seconds)
    p, summary = min(pipe, key=lambda x: x[0].seconds)
    base_rate, rate = lines / b.seconds, lines / p.seconds
    ratio = rate / base_rate
    return {
        "title": "1. replay throughput", "unit": "messages/s",
        "measured": rate, "baseline": base_rate, "ratio": ratio,
        "target": TARGETS["replay_ratio"], "target_text": ">= 0.25",
        "pass": _pass(ratio >= TARGETS["replay_ratio"]),
        "details": {
            "recording": f"{sz.replay_beds} beds x {sz.replay_seconds} s, 10 observations "
                         "per message, one admit per bed",
            "lines": lines, "runs": sz.repeats, "best_of_runs": True,
            "replay_seconds": [round(m.seconds, 3) for m, _ in pipe],
            "validation_seconds": [round(m.seconds, 3) for m in base],
            "replay_in_process_messages_per_s": summary.get("messages_per_s"),
            "startup_seconds": round(start.seconds, 3),
            "replay_peak_rss_mb": round(p.max_rss_kb / 1024, 1),
            "replay_cpu_seconds": round(p.user_s + p.sys_s, 2),
            "observations": summary.get("observations"),
            "derived_computed": summary.get("derived_computed"),
            "derived_stored": summary.get("derived_stored"),
            "alarm_events": summary.get("alarm_events"),
            "rejected": summary.get("rejected_total"),
            "database_mb": round(db_bytes / 1e6, 1),
        },
    }


# --------------------------------------------------------------------------- 2. broker

def _wait_stored(db: Path, n: int, timeout: float, svc: Service) -> float:
    """Poll the database until ``n`` messages are stored; the wall-clock time it was seen."""
    deadline = time.monotonic() + timeout
    while True:
        if stored_count(db) >= n:
            return time.time()
        if svc.proc.poll() is not None:
            raise RuntimeError("hemostream run stopped:\n" + svc.log()[-3000:])
        if time.monotonic() > deadline:
            raise RuntimeError(f"only {stored_count(db)} of {n} messages stored after "
                               f"{timeout:.0f} s")
        time.sleep(0.02)


def _bare_run(work: Path, sz: Sizes, k: int, n_all: int, pub_args: list[str]) -> dict:
    with Broker(work / f"broker-bare-{k}", max_inflight=sz.broker_max_inflight) as br:
        c = spawn("benchmarks.counter", "--url", br.url, "--expect", str(n_all))
        wait_ready(c, "counter")
        pubs = publishers(br.url, sz.publishers, *pub_args)
        pres = [last_json(p, "publisher", 600) for p in pubs]
        cres = last_json(c, "counter", 600)
    span = cres["t_last"] - cres["t_first_obs"]
    return {"count": cres["count"], "obs": cres["obs"], "seconds": span,
            "rate": cres["obs"] / span if span > 0 else 0.0,
            "publisher_rate": publisher_rate(pres)}


def _service_run(work: Path, sz: Sizes, k: int, n_all: int, n_obs: int,
                 pub_args: list[str]) -> dict:
    with Broker(work / f"broker-service-{k}", max_inflight=sz.broker_max_inflight) as br:
        db = work / "broker.db"
        remove_db(db)
        cfg = write_config(work / "broker.toml", db, broker_url=br.url)
        svc = Service(cfg, work / f"broker-service-{k}.log")
        try:
            svc.wait_connected()
            pubs = publishers(br.url, sz.publishers, *pub_args)
            pres = [last_json(p, "publisher", 600) for p in pubs]
            t_done = _wait_stored(db, n_all, 600, svc)
            t_first = min(m["rx"] for m in obs_messages(db))
            rc = svc.stop()
        except BaseException:
            svc.kill()
            raise
        loss = loss_check(db, n_obs)
        remove_db(db)
    span = t_done - t_first
    return {"count": n_all, "seconds": span, "rate": n_obs / span,
            "publisher_rate": publisher_rate(pres), "exit_code": rc, **loss}


def fig_broker(work: Path, sz: Sizes, log: Log) -> dict:
    beds, rounds = sz.broker_beds, sz.broker_rounds
    n_obs = beds * rounds
    n_all = n_obs + beds                                   # with one admit per bed
    pub_args = ["--beds", str(beds), "--rounds", str(rounds)]
    bare, service = [], []
    for k in range(sz.repeats):
        log(f"broker: bare counting subscriber, {n_all} messages, run {k + 1} of "
            f"{sz.repeats}")
        bare.append(_bare_run(work, sz, k, n_all, pub_args))
        log(f"broker: hemostream run, {n_all} messages, run {k + 1} of {sz.repeats}")
        service.append(_service_run(work, sz, k, n_all, n_obs, pub_args))
    b = max(bare, key=lambda r: r["rate"])
    s = max(service, key=lambda r: r["rate"])
    ratio = s["rate"] / b["rate"]
    lost = max(r["lost"] for r in service)
    zero_loss = (lost == 0 and all(r["stored_twice"] == 0 and r["exit_code"] == 0
                                   for r in service)
                 and all(r["count"] == n_all for r in bare))
    return {
        "title": "2. broker path", "unit": "messages/s",
        "measured": s["rate"], "baseline": b["rate"], "ratio": ratio,
        "target": TARGETS["broker_ratio"], "target_text": ">= 0.9, zero loss",
        "pass": _pass(ratio >= TARGETS["broker_ratio"] and zero_loss),
        "lost": lost,
        "details": {
            "stream": f"{beds} beds x {rounds} s of 1 Hz messages (event time), published "
                      f"as fast as QoS 1 allows by {sz.publishers} paho-mqtt process(es); "
                      f"best of {sz.repeats} run(s) each",
            "messages": n_all, "broker_max_inflight": sz.broker_max_inflight,
            "bare_runs": bare, "service_runs": service,
        },
    }


# --------------------------------------------------------------------------- 3. latency

def _alarm_latencies(events: list[dict], pres: list[dict], delay: float,
                     t_last: float) -> tuple[list[float], list[float], int]:
    """Publish-to-alarm times (ms) of the ``HR_high`` raised events.

    For each event: the high run it belongs to starts at the bed's first high-HR message
    (its publish time is the onset); the condition is due ``delay`` seconds later, and the
    message that completes the delay is the bed's first one published at or after that
    moment (1 ms tolerance: the times travel as text). Latency = arrival of the event at
    the listener - publish time of that message (or the due time if the event came before
    it). Also returns, for events raised later than that message (at the service's next
    tick or the next sample), how much later, and how many were raised by it directly.
    """
    stamps: dict[str, list[tuple[float, bool]]] = {}
    for r in pres:
        for bed, ts in (r.get("stamps") or {}).items():
            stamps.setdefault(bed, []).extend((float(t), bool(h)) for t, h in ts)
    onsets: dict[str, list[float]] = {}
    for bed, ts in stamps.items():
        ts.sort()
        prev = False
        for t, high in ts:
            if high and not prev:
                onsets.setdefault(bed, []).append(t)
            prev = high
    lat, extra, direct = [], [], 0
    for e in events:
        if e.get("rule") != "HR_high" or e.get("transition") != "raised" or not e.get("time"):
            continue
        t_ev = parse_time(e["time"])
        if t_ev > t_last:
            continue
        bed = str(e.get("bed", "")).rpartition("/")[2]
        ons = [t for t in onsets.get(bed, ()) if t <= t_ev + 0.0011]
        if not ons:
            continue
        due = ons[-1] + delay
        done = next((t for t, _ in stamps[bed] if t >= due - 0.001), None)
        ref = due if done is None or done > e["recv"] else done
        lat.append((e["recv"] - ref) * 1000)
        if done is not None and abs(t_ev - done) < 0.0011:
            direct += 1
        elif done is not None:
            extra.append((t_ev - done) * 1000)
    return lat, extra, direct


def fig_latency(work: Path, sz: Sizes, log: Log) -> dict:
    beds, rate, secs = sz.latency_beds, sz.latency_rate, sz.latency_seconds
    n_obs = int(rate * secs)
    with Broker(work / "broker-latency") as br:
        db = work / "latency.db"
        remove_db(db)
        cfg = write_config(work / "latency.toml", db, broker_url=br.url,
                           hr_delay_s=sz.latency_hr_delay_s)
        svc = Service(cfg, work / "latency-service.log")
        try:
            svc.wait_connected()
            lis = spawn("benchmarks.alarm_listener", "--url", br.url, "--obs")
            wait_ready(lis, "alarm listener")
            log(f"latency: {rate:.0f} messages/s for {secs:.0f} s, {beds} beds, every "
                f"{sz.latency_alarm_every}th bed's heart rate over its limit in cycles")
            pubs = publishers(br.url, 1, "--beds", str(beds), "--rate", str(rate),
                              "--seconds", str(secs),
                              "--alarm-every", str(sz.latency_alarm_every),
                              "--cycle-s", str(sz.latency_cycle_s),
                              "--high-s", str(sz.latency_high_s),
                              "--spread-s", str(sz.latency_spread_s))
            pres = [last_json(p, "publisher", secs + 300) for p in pubs]
            t_last = max(r["t_last_publish"] for r in pres)
            try:
                _wait_stored(db, n_obs + beds, 120, svc)
            except RuntimeError as e:
                log(f"latency: {e}")
            time.sleep(1.0)                 # alarm events still on their way
            lis.send_signal(signal.SIGTERM)
            lres = last_json(lis, "alarm listener", 60)
            rc = svc.stop()
        except BaseException:
            svc.kill()
            raise
        loss = loss_check(db, n_obs)
        remove_db(db)
    delay = sz.latency_hr_delay_s or 10.0
    lat, extra, by_sample = _alarm_latencies(lres["events"], pres, delay, t_last)
    evs = [e for e in lres["events"] if e.get("rule") == "HR_high"]
    # the baseline over the same stretch of the stream as the alarm events
    ev_t = [parse_time(e["time"]) for e in evs if e.get("time")]
    t0, t1 = (min(ev_t) - 1.0, max(ev_t)) if ev_t else (0.0, 0.0)
    transport = [ms for sent, ms in zip(lres.get("obs_sent") or [],
                                        lres.get("obs_latency_ms") or []) if t0 <= sent <= t1]
    p50 = percentile(lat, 50) if lat else None
    p99 = percentile(lat, 99) if lat else None
    t99 = percentile(transport, 99) if transport else None
    ok = p99 is not None and p99 < TARGETS["latency_p99_ms"] and loss["lost"] == 0
    return {
        "title": "3. latency p99", "unit": "ms",
        "measured": p99, "baseline": t99,
        "ratio": (p99 / t99) if p99 is not None and t99 else None,
        "target": TARGETS["latency_p99_ms"], "target_text": "p99 < 100 ms",
        "pass": _pass(ok), "lost": loss["lost"],
        "details": {
            "stream": f"{beds} beds at {rate / beds:g} Hz = {rate:.0f} messages/s for "
                      f"{secs:.0f} s, QoS 1; every {sz.latency_alarm_every}th bed HR "
                      f"150-154 /min for {sz.latency_high_s:g} s of every "
                      f"{sz.latency_cycle_s:g} s",
            "hr_condition_delay_s": sz.latency_hr_delay_s or 10.0,
            "raised_events": len(lat), "hr_events_all_transitions": len(evs),
            "raised_at_the_completing_sample": by_sample,
            "raised_later": len(lat) - by_sample,
            "raised_later_median_wait_ms": (percentile(extra, 50) if extra else None),
            "transitions": sorted({e["transition"] for e in evs}),
            "p50_ms": p50, "p90_ms": percentile(lat, 90) if lat else None,
            "p99_ms": p99, "max_ms": max(lat) if lat else None,
            "min_ms": min(lat) if lat else None,
            "transport_p50_ms": percentile(transport, 50) if transport else None,
            "transport_p99_ms": t99, "transport_samples": len(transport),
            "transport_window": "observation messages published from 1 s before the first "
                                "to the last alarm event",
            "publisher_rate": publisher_rate(pres), "service_exit_code": rc, **loss,
        },
    }


# --------------------------------------------------------------------------- 4. scale

def _scale_run(work: Path, beds: int, window_s: int, sz: Sizes, rec: Path,
               first: int, log: Log, store_fill: bool = False) -> dict:
    db = work / f"scale-{beds}-{window_s}.db"
    remove_db(db)
    cfg = write_config(work / f"scale-{window_s}.toml", db, window_s=window_s)
    m = run_measured([PY, "-m", "benchmarks.scale_replay", str(rec), "--config", str(cfg),
                      "--db", sqlite_url(db), "--measured-from", str(first)]
                     + (["--store-fill"] if store_fill else [])).check()
    remove_db(db)
    r = json.loads(m.stdout.strip().splitlines()[-1])
    log(f"scale: {beds} beds, {window_s} s windows{', fill stored' if store_fill else ''}: "
        f"{r['us_per_message']:.1f} us/message (main thread {r['main_cpu_us_per_message']:.1f}"
        f", writer {r['writer_cpu_us_per_message']:.1f} CPU), peak RSS "
        f"{m.max_rss_kb / 1024:.0f} MB, {m.seconds:.0f} s")
    return {"beds": beds, "window_s": window_s, "store_fill": store_fill, "lines": r["lines"],
            "measured_lines": r["measured_lines"],
            "us_per_message": r["us_per_message"],
            "fill_us_per_message": r["fill_us_per_message"],
            "peak_rss_mb": m.max_rss_kb / 1024, "seconds": m.seconds,
            "rss_at_measure_start_mb": r["rss_at_measure_start_kb"] / 1024,
            "max_writer_queue_batches": r["max_writer_queue_batches"],
            "backlog_flush_s": r["backlog_flush_s"],
            "main_cpu_us_per_message": r["main_cpu_us_per_message"],
            "writer_cpu_us_per_message": r["writer_cpu_us_per_message"],
            "writer_wall_us_per_message": r["writer_wall_us_per_message"],
            "derived_stored": r["summary"]["derived_stored"],
            "alarm_events": r["summary"]["alarm_events"],
            "rejected": r["summary"]["rejected_total"]}


def fig_scale(work: Path, sz: Sizes, log: Log) -> dict:
    runs = []
    short = grown = None
    for beds in sz.scale_beds:
        measure_s = max(sz.scale_measure_s, -(-sz.scale_measure_messages // beds))
        rec = work / f"scale-{beds}.jsonl"
        lines, first = make_load.write_scale(str(rec), beds, sz.scale_window_s,
                                             sz.scale_fill_every, measure_s)
        log(f"scale: {beds} beds, {lines} lines ({sz.scale_window_s} s fill, one message "
            f"per bed every {sz.scale_fill_every} s, then {measure_s} s at 1 Hz); "
            f"load {load_average()}")
        runs.append(_scale_run(work, beds, sz.scale_window_s, sz, rec, first, log))
        if beds == sz.scale_beds[0]:
            short = _scale_run(work, beds, sz.scale_short_window_s, sz, rec, first, log)
        if beds == sz.db_growth_beds:
            grown = _scale_run(work, beds, sz.scale_window_s, sz, rec, first, log,
                               store_fill=True)
        rec.unlink()
    small, big = runs[0], runs[-1]
    growth = big["us_per_message"] / small["us_per_message"]
    window_growth = small["us_per_message"] / short["us_per_message"]
    rss_run = next((r for r in runs if r["beds"] == sz.rss_beds), None)
    per_bed_kb = ((big["peak_rss_mb"] - small["peak_rss_mb"]) * 1024
                  / (big["beds"] - small["beds"])) if big["beds"] > small["beds"] else None
    lim = TARGETS["cost_growth"]
    rows = [
        {"title": f"4a. cost/message {big['beds']} vs {small['beds']} beds", "unit": "us",
         "measured": big["us_per_message"], "baseline": small["us_per_message"],
         "ratio": growth, "target": lim, "target_text": f"<= {lim} (flat)",
         "pass": _pass(growth <= lim)},
        {"title": f"4b. cost/message {sz.scale_window_s // 60}-min vs "
                  f"{sz.scale_short_window_s // 60}-min windows ({small['beds']} beds)",
         "unit": "us", "measured": small["us_per_message"],
         "baseline": short["us_per_message"], "ratio": window_growth, "target": lim,
         "target_text": f"<= {lim} (flat)", "pass": _pass(window_growth <= lim)},
    ]
    if rss_run is not None:
        rows.append({"title": f"4c. peak RSS at {rss_run['beds']} beds, "
                              f"{sz.scale_window_s // 60}-min windows",
                     "unit": "MB", "measured": rss_run["peak_rss_mb"],
                     "baseline": TARGETS["rss_mb"],
                     "ratio": rss_run["peak_rss_mb"] / TARGETS["rss_mb"], "target": 1.0,
                     "target_text": "< 500 MB", "pass": _pass(rss_run["peak_rss_mb"]
                                                              < TARGETS["rss_mb"])})
    else:
        rss_run = big
        rows.append({"title": f"4c. peak RSS at {big['beds']} beds "
                              f"({sz.scale_window_s // 60}-min windows)",
                     "unit": "MB", "measured": big["peak_rss_mb"], "baseline": None,
                     "ratio": None, "target": None,
                     "target_text": "< 500 MB at 2,000 beds (full run only)", "pass": None})
    rows.append({"title": f"4d. RSS after the fill, {rss_run['beds']} beds (state, "
                          "rows all written)", "unit": "MB",
                 "measured": rss_run["rss_at_measure_start_mb"],
                 "baseline": rss_run["peak_rss_mb"],
                 "ratio": rss_run["rss_at_measure_start_mb"] / rss_run["peak_rss_mb"],
                 "target": None, "target_text": "(information)", "pass": None})
    if grown is not None:
        same = next(r for r in runs if r["beds"] == grown["beds"])
        rows.append({"title": f"4e. cost/message, database holding the fill's rows vs "
                              f"empty ({grown['beds']} beds)", "unit": "us",
                     "measured": grown["us_per_message"], "baseline": same["us_per_message"],
                     "ratio": grown["us_per_message"] / same["us_per_message"],
                     "target": None, "target_text": "(information)", "pass": None})
    return {
        "title": "4. scale", "unit": "us/message",
        "measured": big["us_per_message"], "baseline": small["us_per_message"],
        "ratio": growth, "target": lim, "target_text": f"<= {lim}",
        "pass": _pass(all(r["pass"] is not False for r in rows)),
        "rows": rows,
        "details": {
            "protocol": f"fill {sz.scale_window_s} s (one message per bed every "
                        f"{sz.scale_fill_every} s: full trend windows and duplicate memory; "
                        "its rows not written), then a measured phase at 1 Hz per bed into "
                        "a database holding only the beds; whole pipeline as in hemostream "
                        "replay; peak RSS of the replaying process",
            "runs": runs, "short_window_run": short, "stored_fill_run": grown,
            "rss_per_1000_beds_mb": per_bed_kb * 1000 / 1024 if per_bed_kb else None,
        },
    }
