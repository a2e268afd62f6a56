"""The latency figure's receiving end: a paho subscriber of hemostream's alarm topic.

    python -m benchmarks.alarm_listener --url mqtt://127.0.0.1:PORT

Subscribes to ``hemo/+/+/alarm`` (QoS 1, as a unit console would), prints ``ready`` once
subscribed, notes the wall-clock time at which every alarm *event* message arrives (the
retained state messages on the same topic are counted, not kept), and on SIGTERM or SIGINT
prints one JSON line with the events: bed, rule, transition, event time (as published) and
arrival time. The receive time is taken in paho's network thread, before any decoding.

``--obs`` also subscribes to the input topic ``hemo/+/+/obs`` and reports, for every
observation message, its publish time (the ``time`` field the publisher stamped) and its
publish-to-delivery time: the same stream's transport latency, the latency figure's baseline.
"""

from __future__ import annotations

import argparse
import json
import re
import signal
import sys
import threading
import time
from datetime import datetime
from urllib.parse import urlsplit

import paho.mqtt.client as paho


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--url", required=True)
    ap.add_argument("--max-seconds", type=float, default=900.0)
    ap.add_argument("--obs", action="store_true")
    a = ap.parse_args(argv)
    u = urlsplit(a.url)
    raw: list[tuple[float, bytes]] = []
    obs: list[tuple[float, bytes]] = []
    lock = threading.Lock()
    done = threading.Event()
    subscribed = threading.Event()

    def on_message(client, userdata, m) -> None:
        t = time.time()
        if m.payload[:5] == b'{"v":' and b'"device"' in m.payload[:40]:
            obs.append((t, m.payload[:120]))      # an input message (only paho's thread)
            return
        with lock:
            raw.append((t, m.payload))

    filters = [("hemo/+/+/alarm", 1)] + ([("hemo/+/+/obs", 1)] if a.obs else [])

    c = paho.Client(paho.CallbackAPIVersion.VERSION2,
                    client_id=f"bench-alarms-{int(time.time() * 1000) % 100000}",
                    protocol=paho.MQTTv5)
    c.on_connect = lambda cl, *x: cl.subscribe(filters)
    c.on_subscribe = lambda *x: subscribed.set()
    c.on_message = on_message
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *x: done.set())
    c.connect(u.hostname or "127.0.0.1", u.port or 1883, keepalive=60)
    c.loop_start()
    if not subscribed.wait(15):
        print("alarm listener: could not subscribe", file=sys.stderr)
        return 1
    print("ready", flush=True)
    done.wait(a.max_seconds)
    c.disconnect()
    c.loop_stop()
    events, states = [], 0
    for t, p in raw:
        try:
            d = json.loads(p)
        except ValueError:
            continue
        ev = d.get("event") if isinstance(d, dict) else None
        if not isinstance(ev, dict):
            states += 1
            continue
        events.append({"bed": ev.get("bed"), "rule": ev.get("rule"),
                       "transition": ev.get("transition"), "time": ev.get("time"),
                       "recv": t})
    stamp = re.compile(rb'"time":"([^"]+)"')
    obs_sent, obs_ms = [], []
    for t, p in obs:
        m = stamp.search(p)
        if m:
            sent = datetime.fromisoformat(m.group(1).decode().replace("Z", "+00:00"))
            obs_sent.append(round(sent.timestamp(), 4))
            obs_ms.append(round((t - sent.timestamp()) * 1000, 3))
    print(json.dumps({"events": events, "state_messages": states, "obs_sent": obs_sent,
                      "obs_latency_ms": obs_ms}), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
