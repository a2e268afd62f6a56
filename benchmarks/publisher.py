"""A fast stand-in for a ward of bedside gateways: paho-mqtt, QoS 1, its own process.

    python -m benchmarks.publisher --url mqtt://127.0.0.1:PORT --beds 2000 --rounds 30
    python -m benchmarks.publisher --url ... --beds 2000 --rate 2000 --seconds 60 --alarm-every 10

Every bed first sends an ``admit`` (height and weight, so indexed values are derived), then
one ``obs`` message per round with 10 observations (the same shape as benchmarks/make_load.py:
steady made-up values with seeded jitter; not physiology). Payloads are pre-built text with
the bed's identity, ``seq`` and ``time`` filled in, so the publisher spends its time
publishing, not encoding. ``--part K/N`` takes every N-th bed starting at K, so several
publisher processes share one ward without sharing a bed (each bed stays in order).

Two modes:

- throughput (``--rate 0``): every round as fast as the QoS 1 window allows. The measurement
  time of round r is ``start + r`` seconds (1 Hz per bed in event time, as a real ward), so
  the stream is a ward's ``rounds`` seconds delivered as fast as the link takes it.
- paced (``--rate R`` messages per second over this process's beds): each message is
  stamped with the wall-clock time at which it is handed to the client (microseconds), so a
  receiver can measure publish-to-anything latency from the ``time`` field itself.

``--alarm-every K`` makes every K-th bed a high heart rate (150-154 /min, above the shipped
HR limit of 140) for ``--high-s`` seconds of every ``--cycle-s``, starting at a per-bed offset
spread over ``--spread-s``, so limit alarms are raised and ended throughout the run.

Prints one JSON line: published, acknowledged (PUBACKs), start, last publish and last PUBACK
wall-clock times, and in paced mode the publish time of every message of the alarm beds with
whether its heart rate was the high one.
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import threading
import time
from urllib.parse import urlsplit

import paho.mqtt.client as paho

from .make_load import VARIANTS, obs_variants

UNIT = "BENCH"


def bed_name(b: int) -> str:
    return f"bed-{b:04d}"


def iso_ms(t: float) -> str:
    s = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(t))
    return f"{s}.{int(round((t % 1) * 1000)) % 1000:03d}Z"


def iso_us(t: float) -> str:
    whole = int(t)
    us = int(round((t - whole) * 1e6))
    if us >= 1_000_000:
        whole, us = whole + 1, us - 1_000_000
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(whole)) + f".{us:06d}Z"


class Ward:
    """Pre-built payload text for this process's beds."""

    def __init__(self, beds: list[int], unit: str, seed: int, alarm_every: int,
                 cycle_s: float, high_s: float, spread_s: float) -> None:
        rnd = random.Random(seed)
        self.normal = obs_variants(rnd, False)
        self.high = obs_variants(rnd, True)
        self.beds = beds
        self.unit = unit
        self.topics = [f"hemo/{unit}/{bed_name(b)}/obs" for b in beds]
        self.heads = [f'{{"v":1,"device":"gw-{unit.lower()}-{b:04d}","seq":' for b in beds]
        self.cycle_s, self.high_s = cycle_s, high_s
        #: per bed: phase offset of its high heart rate, or None
        self.phase = []
        k = 0
        for b in beds:
            if alarm_every and b % alarm_every == 0:
                self.phase.append((k * 7.31) % spread_s if spread_s > 0 else 0.0)
                k += 1
            else:
                self.phase.append(None)

    def alarm_beds(self) -> int:
        return sum(p is not None for p in self.phase)

    def admit(self, i: int, t: str) -> tuple[str, bytes]:
        b = self.beds[i]
        return (f"hemo/{self.unit}/{bed_name(b)}/admit",
                f'{{"v":1,"time":"{t}","height_cm":{160 + b % 30},"weight_kg":{60 + b % 40}}}'
                .encode())

    def obs(self, i: int, seq: int, t: str, elapsed: float) -> bytes:
        return self.obs_flag(i, seq, t, elapsed)[0]

    def obs_flag(self, i: int, seq: int, t: str, elapsed: float) -> tuple[bytes, bool]:
        """The payload, and whether its heart rate is the high one."""
        ph = self.phase[i]
        k = (i + seq) % VARIANTS
        high = ph is not None and elapsed >= ph and (elapsed - ph) % self.cycle_s < self.high_s
        arr = self.high[k] if high else self.normal[k]
        return f'{self.heads[i]}{seq},"time":"{t}","obs":{arr}}}'.encode(), high


class Client:
    def __init__(self, url: str, client_id: str, window: int) -> None:
        u = urlsplit(url)
        self.acked = 0
        self.last_ack = 0.0
        self._lock = threading.Lock()
        self._connected = threading.Event()
        c = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id=client_id,
                        protocol=paho.MQTTv5)
        c.max_inflight_messages_set(window)
        c.max_queued_messages_set(0)
        c.on_connect = lambda *a: self._connected.set()
        c.on_publish = self._on_publish
        c.connect(u.hostname or "127.0.0.1", u.port or 1883, keepalive=60)
        c.loop_start()
        if not self._connected.wait(15):
            raise SystemExit("publisher: no CONNACK from the broker")
        self.c = c

    def _on_publish(self, client, userdata, mid, reason_code=None, properties=None) -> None:
        with self._lock:
            self.acked += 1
            self.last_ack = time.time()

    def publish(self, topic: str, payload: bytes) -> None:
        info = self.c.publish(topic, payload, 1, False)
        if info.rc != paho.MQTT_ERR_SUCCESS:
            raise SystemExit(f"publisher: publish failed ({paho.error_string(info.rc)})")

    def wait_acked(self, n: int, timeout: float) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self._lock:
                if self.acked >= n:
                    return True
            time.sleep(0.002)
        return False

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--url", required=True)
    ap.add_argument("--beds", type=int, default=200)
    ap.add_argument("--part", default="0/1", help="K/N: every N-th bed starting at K")
    ap.add_argument("--unit", default=UNIT)
    ap.add_argument("--rounds", type=int, default=30, help="throughput mode: rounds")
    ap.add_argument("--rate", type=float, default=0.0,
                    help="paced mode: messages per second of this process (0: throughput)")
    ap.add_argument("--seconds", type=float, default=60.0, help="paced mode: duration")
    ap.add_argument("--alarm-every", type=int, default=0)
    ap.add_argument("--cycle-s", type=float, default=30.0)
    ap.add_argument("--high-s", type=float, default=15.0)
    ap.add_argument("--spread-s", type=float, default=30.0)
    ap.add_argument("--start-at", type=float, default=0.0,
                    help="wall-clock time to begin publishing observations (after admits)")
    ap.add_argument("--window", type=int, default=1000, help="QoS 1 messages in flight")
    ap.add_argument("--seed", type=int, default=11)
    a = ap.parse_args(argv)
    k, n = (int(x) for x in a.part.split("/"))
    beds = list(range(k + 1, a.beds + 1, n))
    ward = Ward(beds, a.unit, a.seed + k, a.alarm_every, a.cycle_s, a.high_s, a.spread_s)
    cl = Client(a.url, f"bench-pub-{a.unit.lower()}-{k}of{n}-{int(time.time() * 1000) % 100000}",
                a.window)
    sent = 0
    #: paced mode: (publish time, high heart rate?) of every message of the alarm beds
    stamps: dict[str, list[tuple[float, bool]]] = {}
    now = time.time()
    t_admit = iso_ms(now)
    for i in range(len(beds)):
        cl.publish(*ward.admit(i, t_admit))
        sent += 1
    if not cl.wait_acked(sent, 60):
        raise SystemExit("publisher: admits not acknowledged")
    if a.start_at:
        delay = a.start_at - time.time()
        if delay > 0:
            time.sleep(delay)
    t_start = time.time()
    topics = ward.topics
    pub = cl.publish
    nb = len(beds)
    if a.rate <= 0:                     # throughput: event time = start + round
        base = float(int(t_start))
        for r in range(a.rounds):
            ts = iso_ms(base + r)
            for i in range(nb):
                pub(topics[i], ward.obs(i, r, ts, float(r)))
            sent += nb
    else:                               # paced, stamped with the publish time
        total = int(a.rate * a.seconds)
        interval = 1.0 / a.rate
        mono0 = time.monotonic()
        m = 0
        while m < total:
            due = mono0 + m * interval
            wait = due - time.monotonic()
            if wait > 0.0005:
                time.sleep(wait)
            # publish everything that is due now
            limit = min(total, int((time.monotonic() - mono0) / interval) + 1)
            while m < limit:
                i = m % nb
                t = time.time()
                body, high = ward.obs_flag(i, m // nb, iso_us(t), t - t_start)
                pub(topics[i], body)
                if ward.phase[i] is not None:
                    stamps.setdefault(bed_name(beds[i]), []).append((round(t, 6), high))
                m += 1
        sent += total
    t_last = time.time()
    ok = cl.wait_acked(sent, 300)
    with cl._lock:
        acked, last_ack = cl.acked, cl.last_ack
    cl.close()
    print(json.dumps({"published": sent, "admits": nb, "acknowledged": acked, "complete": ok,
                      "beds": nb, "alarm_beds": ward.alarm_beds(), "t_start": t_start,
                      "t_last_publish": t_last, "t_last_ack": last_ack, "stamps": stamps}),
          flush=True)
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
