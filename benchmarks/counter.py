"""The broker figure's baseline: a bare aiomqtt subscriber that only counts.

    python -m benchmarks.counter --url mqtt://127.0.0.1:PORT --expect N

Subscribes like ``hemostream run`` does (MQTT 5, QoS 1, the same four input filters, a
persistent session and the same Receive Maximum), prints ``ready`` once subscribed, counts
every message until ``--expect`` have come (or nothing came for ``--idle-s``), and prints
one JSON line: the count, and the wall-clock times of the first observation message and of
the last message (the admits before the stream are counted but not timed). paho sends each
PUBACK as soon as the message is handed over; nothing else happens to it.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import sys
import time
from urllib.parse import urlsplit

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

FILTERS = ["hemo/+/+/obs", "hemo/+/+/admit", "hemo/+/+/note", "hemo/+/+/cmd"]


async def count(url: str, expect: int, idle_s: float, receive_maximum: int) -> dict:
    u = urlsplit(url)
    props = Properties(PacketTypes.CONNECT)
    props.SessionExpiryInterval = 600
    props.ReceiveMaximum = receive_maximum
    n = n_obs = 0
    first = last = 0.0
    async with aiomqtt.Client(u.hostname or "127.0.0.1", u.port or 1883,
                              identifier=f"bench-counter-{int(time.time() * 1000) % 100000}",
                              protocol=aiomqtt.ProtocolVersion.V5, clean_start=False,
                              properties=props) as c:
        await c.subscribe([(f, 1) for f in FILTERS])
        print("ready", flush=True)
        it = c.messages.__aiter__()
        while n < expect:
            try:
                m = await asyncio.wait_for(it.__anext__(), idle_s)
            except asyncio.TimeoutError:
                break
            last = time.time()
            n += 1
            if m.topic.value.endswith("/obs"):
                if n_obs == 0:
                    first = last
                n_obs += 1
    return {"count": n, "obs": n_obs, "t_first_obs": first, "t_last": last}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--url", required=True)
    ap.add_argument("--expect", type=int, required=True)
    ap.add_argument("--idle-s", type=float, default=15.0)
    ap.add_argument("--receive-maximum", type=int, default=1000)
    a = ap.parse_args(argv)
    r = asyncio.run(count(a.url, a.expect, a.idle_s, a.receive_maximum))
    print(json.dumps(r), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
