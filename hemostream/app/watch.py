"""``hemostream watch``: the unit dashboard on another machine, fed from the broker.

The wiring only: :mod:`hemostream.dashboard` is the view, :mod:`hemostream.live` the broker client.

Subscribes (read-only) to the service's ``alarm`` and ``derived`` topics of one unit, the
unit's ``note`` topics and the service status; acknowledge and audio-pause keys publish a
``cmd`` message exactly as ``hemostream ack`` does (that needs publish rights on ``cmd``).
"""

from __future__ import annotations

import asyncio
import json
import logging
import os
import threading
import time
from typing import Any

from rich.console import Console

from .. import CAUTION
from ..core.config import Config
from ..core.wire import bed_topic, command_body, encode, status_topic, topic
from ..dashboard import Dashboard, Screen, UnitView, unit_screen
from ..live.mqtt import MqttTransport
from ..live.service import backoff
from ..live.transport import TransportError

log = logging.getLogger("hemostream.watch")


def unit_view(cfg: Config) -> UnitView:
    """The dashboard model for ``cfg``: a value goes stale after the configured maximum age
    of its parameter (``[derive] max_age_s``), in ``watch`` and in the demo alike."""
    return UnitView(cfg.derive.max_age_s)


class BrokerFeed:
    """Keeps a :class:`UnitView` current from the broker, on its own event-loop thread."""

    def __init__(self, cfg: Config, unit: str) -> None:
        self.unit = unit
        self.view = unit_view(cfg)
        self.lock = threading.Lock()
        broker = cfg.broker.model_copy(update={"client_id": f"hemostream-watch-{os.getpid()}"})
        self.transport = MqttTransport(broker, persistent=False)
        self.connected = False
        self.error: str | None = None
        self.received = 0
        self._times: list[float] = []
        self.loop = asyncio.new_event_loop()
        self._stop = asyncio.Event()
        self._thread = threading.Thread(target=self._run, name="watch-feed", daemon=True)
        self.filters = [topic(unit, "+", "alarm"), topic(unit, "+", "derived"),
                        topic(unit, "+", "note"), status_topic("+")]

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        if self.loop.is_running():
            self.loop.call_soon_threadsafe(self._stop.set)
        self._thread.join(5)

    def _run(self) -> None:
        asyncio.set_event_loop(self.loop)
        self.loop.run_until_complete(self._main())

    async def _main(self) -> None:
        attempt = 0
        cfg = self.transport.cfg
        while not self._stop.is_set():
            try:
                await self.transport.connect()
                await self.transport.subscribe(self.filters, qos=1)
                self.connected, self.error, attempt = True, None, 0
                reader = asyncio.ensure_future(self._read())
                stopper = asyncio.ensure_future(self._stop.wait())
                done, _ = await asyncio.wait({reader, stopper},
                                             return_when=asyncio.FIRST_COMPLETED)
                for t in (reader, stopper):
                    if t not in done:
                        t.cancel()
                if reader in done:
                    reader.result()
            except TransportError as e:
                self.connected, self.error = False, str(e)
                if e.refused:
                    log.error("%s", e)
                attempt += 1
                try:
                    await asyncio.wait_for(self._stop.wait(),
                                           backoff(attempt, cfg.reconnect_min_s,
                                                   cfg.reconnect_max_s))
                except asyncio.TimeoutError:
                    pass
        try:
            await self.transport.disconnect()
        except Exception:  # noqa: BLE001 - leaving anyway
            pass

    async def _read(self) -> None:
        async for m in self.transport.messages():
            try:
                payload = json.loads(m.payload)
            except (ValueError, UnicodeDecodeError):
                payload = None
            with self.lock:
                self.view.apply(m.topic, payload)
            self.received += 1
            self._times.append(time.monotonic())
            self.transport.ack(m.generation, m.mid, m.qos)

    def rate(self) -> float:
        now = time.monotonic()
        self._times = [t for t in self._times if now - t < 5.0]
        return len(self._times) / 5.0

    def status(self) -> dict[str, Any]:
        lag = None
        with self.lock:
            newest = self.view.newest
        if newest > 0:
            lag = max(0.0, time.time() - newest)
        return {"connected": self.connected, "rate": self.rate(), "lag_s": lag}

    def send_command(self, bed_key: str, action: str, alarm: str, by: str) -> None:
        """Publish a ``cmd`` message (the same message ``hemostream ack`` sends)."""
        body = command_body(action, alarm, by, time.time())
        fut = asyncio.run_coroutine_threadsafe(
            self.transport.publish_wait(bed_topic(bed_key, "cmd"), encode(body), 1, False,
                                        timeout=5), self.loop)
        fut.result(6)


def run_watch(cfg: Config, unit: str, operator: str | None = None,
              once_s: float | None = None, size: tuple[int, int] = (120, 40)) -> int:
    """Show the unit live until quit; with ``once_s``, print one screen after that long."""
    feed = BrokerFeed(cfg, unit)
    names = {u.id: u.name for u in cfg.units if u.name}
    feed.start()
    try:
        if once_s is not None:
            deadline = time.monotonic() + once_s
            while time.monotonic() < deadline:
                time.sleep(0.1)
            console = Console(width=size[0], height=size[1], force_terminal=False)
            st = feed.status()
            scr = Screen(unit=unit, source=str(feed.transport.address),
                         connected=st["connected"], rate=st["rate"], lag_s=st["lag_s"],
                         operator=operator, unit_names=names)
            with feed.lock:
                console.print(unit_screen(feed.view, scr, time.time(), size[0], size[1]))
                seen = bool(feed.view.beds)
            print(f"CAUTION: {CAUTION}")
            if feed.error and not feed.connected:
                print(f"not connected: {feed.error}")
                return 1
            if not seen:
                known = ", ".join(u.id for u in cfg.units) or "none configured"
                print(f"no data from unit {unit!r} seen in {once_s:g} s: check the unit id "
                      f"(units in the configuration: {known}) and that the service runs")
                return 1
            return 0
        dash = Dashboard(feed.view, Screen(unit=unit, source=str(feed.transport.address),
                                           operator=operator, unit_names=names),
                         send_command=lambda b, a, i: feed.send_command(b, a, i, operator or ""),
                         status=feed.status, lock=feed.lock)
        dash.run()
        return 0
    finally:
        feed.stop()
