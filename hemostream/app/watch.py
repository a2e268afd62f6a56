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
import signal
import sys
import threading
import time
from typing import Any

from rich.console import Console

from .. import CAUTION
from ..core.config import Config
from ..core.wire import (bed_topic, command_body, encode, is_status_topic, split_topic,
                         status_topic, topic)
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
        self._task: asyncio.Task | None = None
        self._thread = threading.Thread(target=self._run, name="watch-feed", daemon=True)
        self.filters = [topic(unit, "+", "alarm"), topic(unit, "+", "derived"),
                        topic(unit, "+", "note"), status_topic("+")]
        #: every unit's outputs, only to name the units there are when ``unit`` sends nothing
        #: (the broker may refuse them to a client with rights to one unit: then unnamed)
        self.survey = [topic("+", "+", "alarm"), topic("+", "+", "derived")]
        self.surveying = False
        self.units_seen: set[str] = set()
        self.connected_at: float | None = None
        self.started = time.monotonic()

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        """End the feed at once, also in the middle of a connection attempt."""
        if self.loop.is_running() and self._task is not None:
            self.loop.call_soon_threadsafe(self._task.cancel)
        self._thread.join(2)

    def _run(self) -> None:
        asyncio.set_event_loop(self.loop)
        self._task = self.loop.create_task(self._main())
        try:
            self.loop.run_until_complete(self._task)
        except asyncio.CancelledError:
            pass
        # as asyncio.run ends: what the client library left running (a connection attempt
        # cut short) is cancelled and let finish while the loop still runs
        pending = asyncio.all_tasks(self.loop)
        for t in pending:
            t.cancel()
        self.loop.run_until_complete(asyncio.gather(*pending, return_exceptions=True))
        self.loop.run_until_complete(self.transport.drop())

    async def _main(self) -> None:
        try:
            await self._connected_loop()
        finally:
            try:
                await asyncio.wait_for(self.transport.disconnect(), 1.0)
            except (Exception, asyncio.CancelledError):  # noqa: BLE001 - leaving anyway
                pass

    async def _connected_loop(self) -> None:
        attempt = 0
        cfg = self.transport.cfg
        while not self._stop.is_set():
            try:
                await self.transport.connect()
                await self.transport.subscribe(self.filters, qos=1)
                self.connected, self.error, attempt = True, None, 0
                self.connected_at = self.connected_at or time.monotonic()
                await self._subscribe_survey()
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

    async def _subscribe_survey(self) -> None:
        if self.units_seen and self.unit in self.units_seen:
            return                          # the unit is there: no need to look wider
        try:
            await self.transport.subscribe(self.survey, qos=0)
            self.surveying = True
        except TransportError as e:
            if not e.refused:
                raise
            self.surveying = False

    async def _read(self) -> None:
        async for m in self.transport.messages():
            t = split_topic(m.topic)
            if t is not None and not is_status_topic(t):
                self.units_seen.add(t.unit)
                if t.unit != self.unit:     # a survey message: only its unit id counts
                    self.transport.ack(m.generation, m.mid, m.qos)
                    continue
            try:
                payload = json.loads(m.payload)
            except (ValueError, UnicodeDecodeError):
                payload = None
            with self.lock:
                self.view.apply(m.topic, payload)
            self.received += 1
            self._times.append(time.monotonic())
            self.transport.ack(m.generation, m.mid, m.qos)

    def notice(self, quiet_s: float = 3.0) -> str:
        """What the feed waits for, in words ("" when the unit's data come in): the broker,
        or data from the unit (after ``quiet_s`` connected without any, with the units that
        were seen)."""
        where = self.transport.address
        if not self.connected:
            if self.error:
                return f"waiting for the broker at {where}: not connected ({self.error})"
            if time.monotonic() - self.started > 1.0:
                return f"waiting for the broker at {where}: connecting, no answer yet"
            return ""
        if self.unit in self.units_seen or self.connected_at is None:
            return ""
        quiet = time.monotonic() - self.connected_at
        if quiet < quiet_s:
            return ""
        others = sorted(self.units_seen - {self.unit})
        seen = (f"units seen on the broker: {', '.join(others)}" if others
                else "no unit seen on the broker" if self.surveying
                else "the broker lets this client see only this unit")
        return (f"no data from unit {self.unit!r} seen in {quiet:.0f} s: no such unit here? "
                f"({seen})")

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
        return {"connected": self.connected, "rate": self.rate(), "lag_s": lag,
                "notice": self.notice()}

    def send_command(self, bed_key: str, action: str, alarm: str, by: str) -> None:
        """Publish a ``cmd`` message (the same message ``hemostream ack`` sends)."""
        body = command_body(action, alarm, by, time.time())
        fut = asyncio.run_coroutine_threadsafe(
            self.transport.publish_wait(bed_topic(bed_key, "cmd"), encode(body), 1, False,
                                        timeout=5), self.loop)
        fut.result(6)


def _stop_on_signals(stop: threading.Event) -> dict[str, str]:
    """Ctrl-C (SIGINT) and SIGTERM set ``stop`` (the main thread's handlers); the returned
    dict gets the signal's name."""
    got: dict[str, str] = {}

    def handler(signum: int, frame: Any) -> None:
        got.setdefault("signal", signal.Signals(signum).name)
        stop.set()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, handler)
    return got


def run_watch(cfg: Config, unit: str, operator: str | None = None,
              once_s: float | None = None, size: tuple[int, int] = (120, 40)) -> int:
    """Show the unit live until quit (q, Ctrl-C or SIGTERM); with ``once_s``, print one
    screen after that long. What it waits for (the broker, data from the unit) is on the
    screen's message line, and on standard error with ``once_s``."""
    feed = BrokerFeed(cfg, unit)
    names = {u.id: u.name for u in cfg.units if u.name}
    stop = threading.Event()
    got = _stop_on_signals(stop)
    feed.start()
    try:
        if once_s is not None:
            deadline = time.monotonic() + once_s
            said = ""
            while time.monotonic() < deadline and not stop.is_set():
                text = feed.notice(quiet_s=min(3.0, once_s))
                if text and text.split(":")[0] != said.split(":")[0]:
                    print(text, file=sys.stderr, flush=True)
                said = text or said
                stop.wait(0.1)
            if stop.is_set():
                print(f"watch stopped by {got.get('signal', 'a signal')} before the "
                      f"{once_s:g} s were up" + (f" ({feed.notice(0)})" if feed.notice(0)
                                                  else ""), file=sys.stderr)
                return 130
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
                others = sorted(feed.units_seen - {unit})
                print(f"no data from unit {unit!r} seen in {once_s:g} s: check the unit id "
                      f"(units in the configuration: {known}"
                      + (f"; seen on the broker: {', '.join(others)}" if others else "")
                      + ") and that the service runs")
                return 1
            return 0
        dash = Dashboard(feed.view, Screen(unit=unit, source=str(feed.transport.address),
                                           operator=operator, unit_names=names),
                         send_command=lambda b, a, i: feed.send_command(b, a, i, operator or ""),
                         status=feed.status, lock=feed.lock)
        dash.run(stop)
        if stop.is_set():
            print(f"watch ended ({got.get('signal', 'signal')})", file=sys.stderr)
        return 0
    finally:
        feed.stop()
