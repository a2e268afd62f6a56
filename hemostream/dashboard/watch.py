"""``hemostream watch``: the unit dashboard on another machine, fed from the broker.

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
from datetime import datetime, timezone
from typing import Any

from ..core.config import Config
from ..core.wire import format_time
from .app import Dashboard
from .model import UnitView
from .render import Screen, unit_screen

log = logging.getLogger("hemostream.watch")


class BrokerFeed:
    """Keeps a :class:`UnitView` current from the broker, on its own event-loop thread."""

    def __init__(self, cfg: Config, unit: str) -> None:
        from ..live.mqtt import MqttTransport

        self.unit = unit
        self.view = UnitView(cfg.derive.max_age_s)
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
        self.filters = [f"hemo/{unit}/+/alarm", f"hemo/{unit}/+/derived",
                        f"hemo/{unit}/+/note", "hemo/_svc/+/status"]

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
        from ..live.service import backoff
        from ..live.transport import TransportError

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
        body = {"v": 1, "time": format_time(datetime.now(timezone.utc)), "action": action,
                "alarm": alarm, "by": by}
        topic = f"hemo/{bed_key}/cmd"
        fut = asyncio.run_coroutine_threadsafe(
            self.transport.publish_wait(topic, json.dumps(body, separators=(",", ":")).encode(),
                                        1, False, timeout=5), self.loop)
        fut.result(6)


def run_watch(cfg: Config, unit: str, operator: str | None = None,
              once_s: float | None = None, size: tuple[int, int] = (120, 40)) -> int:
    """Show the unit live until quit; with ``once_s``, print one screen after that long."""
    from rich.console import Console

    feed = BrokerFeed(cfg, unit)
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
                         operator=operator)
            with feed.lock:
                console.print(unit_screen(feed.view, scr, time.time(), size[0], size[1]))
            if feed.error and not feed.connected:
                print(f"not connected: {feed.error}")
                return 1
            return 0
        dash = Dashboard(feed.view, Screen(unit=unit, source=str(feed.transport.address),
                                           operator=operator),
                         send_command=lambda b, a, i: feed.send_command(b, a, i, operator or ""),
                         status=feed.status, lock=feed.lock)
        dash.run()
        return 0
    finally:
        feed.stop()


def add_parser(sub) -> None:
    """Register ``hemostream watch`` on the CLI's subparsers."""
    from .. import CAUTION

    w = sub.add_parser(
        "watch", help="show a unit's live dashboard from the broker (read-only)",
        description="The unit dashboard on any machine: subscribes to the service's alarm "
                    "and derived topics of one unit (subscribe rights are enough). The keys "
                    "a and p acknowledge or pause the audio of the selected alarm by "
                    "publishing a cmd message, as 'hemostream ack' does.", epilog=CAUTION)
    w.add_argument("--broker", metavar="URL", help="mqtt://host:port or mqtts://host:port "
                   "(default: the config's broker.url)")
    w.add_argument("--unit", required=True, metavar="U", help="unit id, e.g. SDU4")
    w.add_argument("--config", metavar="FILE", help="TOML configuration (broker security "
                   "settings: username, password_env/password_file, ca_file ...)")
    w.add_argument("--operator", metavar="NAME", help="who acknowledges (recorded for "
                   "audit); without it the acknowledge keys are off")
    w.add_argument("--once", type=float, metavar="SECONDS", help="collect for SECONDS, print "
                   "one screen as text and exit (for scripts and checks)")
    w.add_argument("--size", default="120x40", metavar="WxH",
                   help="screen size for --once (default 120x40)")
    w.set_defaults(func=_cmd_watch)


def _cmd_watch(args) -> int:
    import sys

    from ..config import load_for_command, with_overrides
    from ..core.wire import ID_RE
    from ..live.mqtt import BrokerSettingsError

    cfg = with_overrides(load_for_command(args.config), broker=args.broker)
    if not ID_RE.match(args.unit):
        print(f"error: --unit {args.unit!r}: 1-32 characters of A-Z a-z 0-9 - _",
              file=sys.stderr)
        return 2
    if args.once is None and not sys.stdout.isatty():
        print("error: the live dashboard needs a terminal; use --once SECONDS for text",
              file=sys.stderr)
        return 2
    try:
        w, h = (int(x) for x in args.size.lower().split("x"))
    except ValueError:
        print(f"error: --size {args.size!r}: expected WIDTHxHEIGHT, e.g. 120x40",
              file=sys.stderr)
        return 2
    try:
        return run_watch(cfg, args.unit, args.operator, args.once, (w, h))
    except BrokerSettingsError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
