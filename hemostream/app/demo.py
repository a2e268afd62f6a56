"""``hemostream demo``: a simulated ward through the live pipeline, with no broker to install.

The ward's messages go through an in-process broker (:mod:`hemostream.live.inproc`: persistent session,
QoS 1 acknowledgement after the commit, retained alarm state) into the same
:class:`~hemostream.live.service.Service` that ``hemostream run`` uses, and into a SQLite file.
``--broker URL`` sends the same stream through a real broker instead. A subscriber of the
published outputs (derived values, alarm state, health) feeds the live view.

Time: the scenario's times are moved to now. At ``--speed N`` the service runs on a clock
that goes N times as fast as the wall clock, so measurement times and arrival times stay
consistent (no clock-skew rejects) and the stored times are the scenario's, moved to now.
"""

from __future__ import annotations

import asyncio
import itertools
import json
import logging
import signal
import sys
import time
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, TextIO

from .. import CAUTION
from ..core.config import Config
from ..core.wire import format_epoch, parse_time_or_none, status_topic, topic
from ..live.health import status_payload
from ..live.inproc import InprocBroker
from ..live.mqtt import MqttTransport
from ..live.publish import (Retimer, as_record, close_gaps, payload_bytes,
                            publish_recording_lines)
from ..live.service import Service
from ..live.transport import Transport, TransportError
from .demo_views import DemoDashboard, Summary, demo_dashboard

__all__ = ["DemoDashboard", "Summary", "demo_dashboard", "demo_lines", "run_demo"]

simulators: Any
try:
    import simulators
except ImportError:              # a separate, optional package: the example recording then
    simulators = None

log = logging.getLogger("hemostream.live.demo")

EXAMPLE_RECORDING = (Path(__file__).resolve().parent.parent.parent / "simulators"
                     / "recordings" / "example-ward.jsonl")


def demo_lines(scenario: str | None = None, duration_s: float | None = None,
               seed: int = 0) -> tuple[Iterator[dict], str]:
    """The demo ward's recording lines (lazily, in arrival order) and a sentence saying where
    they come from: the simulators' demo ward when they are installed, otherwise the shipped
    example recording, and the sentence says so."""
    why = "the simulators are not installed"
    missing_generate = "the simulators package has no generate() (reinstall: pip install -e .)"
    if simulators is None:
        generate = None
    else:
        generate = getattr(simulators, "generate", None)
        if generate is None:
            why = missing_generate
    if generate is not None:
        name = (scenario or getattr(simulators, "DEMO_WARD", None)
                or getattr(simulators, "DEMO_SCENARIO", None) or "demo")
        try:
            it = iter(generate(name, duration_s=duration_s, seed=seed))
            first = next(it, None)
        except Exception as e:  # noqa: BLE001 - say why, and still show something
            if scenario:
                raise
            why = f"the simulators could not make scenario {name!r}: {e}"
        else:
            lines = (r for r in (as_record(x) for x in itertools.chain([first], it)
                                 if x is not None) if r)
            return close_gaps(lines), f"simulated ward (scenario {name!r}, seed {seed})"
    if scenario:
        raise ValueError(f"scenario {scenario!r}: {why}")

    def example() -> Iterator[dict]:
        t0 = None
        with open(EXAMPLE_RECORDING, "rb") as f:
            for rec in close_gaps(r for r in map(as_record, f) if r is not None):
                t = parse_time_or_none(rec.get("rx")) if duration_s is not None else None
                if t is not None and duration_s is not None:
                    t0 = t if t0 is None else t0
                    if t - t0 > duration_s:
                        return
                yield rec

    return example(), f"shipped example recording {EXAMPLE_RECORDING.name} ({why})"


class ScaledClock:
    """Wall-clock epoch seconds from ``start``, running ``speed`` times as fast."""

    def __init__(self, speed: float = 1.0, start: float | None = None) -> None:
        self.speed = speed
        self.start = time.time() if start is None else start
        self._m0 = time.monotonic()

    def __call__(self) -> float:
        return self.start + (time.monotonic() - self._m0) * self.speed

    def wall_delay(self, t: float) -> float:
        """Wall seconds until the clock reads ``t``."""
        return (t - self()) / self.speed


async def _feed_inproc(broker: InprocBroker, lines: Iterable[dict], clock: ScaledClock,
                       stop: asyncio.Event) -> int:
    n = 0
    for rec in lines:
        if stop.is_set():
            break
        rx = parse_time_or_none(rec.get("rx"))
        if rx is not None:
            delay = clock.wall_delay(rx)
            if delay > 0:
                try:
                    await asyncio.wait_for(stop.wait(), delay)
                    break
                except asyncio.TimeoutError:
                    pass
        broker.publish(rec["topic"], payload_bytes(rec["payload"]), 1, False)
        n += 1
    return n


async def run_demo(cfg: Config, db_url: str, *, speed: float = 1.0,
                   duration_s: float | None = None, scenario: str | None = None,
                   seed: int = 0, broker_url: str | None = None,
                   out: TextIO = sys.stdout, every_s: float = 2.0,
                   view: Callable[[str, Any], None] | None = None,
                   install_signals: bool = True, dashboard: bool = False,
                   operator: str | None = None) -> dict:
    """Run the demo until the stream ends or Ctrl-C; returns a summary dict."""
    lines, source = demo_lines(scenario, duration_s, seed)
    # its own client identifier, status topic and a short-lived session, so a demo on a
    # shared broker neither takes over nor outlives the real service's session
    cfg = cfg.model_copy(update={
        "instance": f"{cfg.instance}-demo",
        "broker": cfg.broker.model_copy(update={
            "client_id": f"{cfg.broker.client_id}-demo", "session_expiry_s": 300,
            "health_every_s": 1.0})})
    clock = ScaledClock(speed)
    rt = Retimer(clock.start, 1.0)               # shift only: the clock carries the speed
    lines = (rt.record(r) for r in lines)
    print(f"CAUTION: {CAUTION}", file=out)
    print(f"demo: the {source}, at {speed:g} x real time, "
          f"{'through ' + broker_url if broker_url else 'through the in-process broker'}, "
          f"into {db_url}", file=out)
    out.flush()
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    if install_signals:
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                loop.add_signal_handler(sig, stop.set)
            except (NotImplementedError, RuntimeError):
                pass
    summary = Summary()
    will_topic = status_topic(cfg.instance)
    offline = status_payload(cfg.instance, "offline", None, reason="connection lost")
    out_filters = [topic("+", "+", "derived"), topic("+", "+", "alarm"),
                   topic("+", "+", "note"), status_topic(cfg.instance)]

    def show(topic: str, payload: bytes) -> None:
        try:
            p = json.loads(payload)
        except ValueError:
            return
        summary.apply(topic, p)
        if view is not None:
            view(topic, p)

    transport: Transport
    watcher: Transport
    if broker_url is None:
        broker = InprocBroker()
        transport = broker.client(cfg.broker.client_id, will=(will_topic, offline),
                                  clock=clock, receive_maximum=cfg.broker.receive_maximum)
        watcher = broker.client("hemostream-demo-view", persistent=False)
    else:
        cfg = cfg.model_copy(update={"broker": cfg.broker.model_copy(
            update={"url": broker_url})})
        transport = MqttTransport(cfg.broker, will=(will_topic, offline), clock=clock)
        watcher = MqttTransport(cfg.broker.model_copy(update={
            "client_id": f"{cfg.broker.client_id}-view"}), persistent=False)
    svc = Service(cfg, transport, db_url=db_url, clock=clock, log_health=False)
    svc_task = asyncio.create_task(svc.run())
    dash = None
    if dashboard:
        dash = demo_dashboard(svc, clock, loop, source, operator,
                              broker if broker_url is None else None, watcher).start()
        view = dash.feed

    async def watch() -> None:
        while True:
            try:
                await watcher.connect()
                await watcher.subscribe(out_filters, 0)
                async for m in watcher.messages():
                    show(m.topic, m.payload)
            except TransportError as e:
                log.debug("view: %s", e)
                await asyncio.sleep(0.5)

    where = broker_url or "the in-process broker"

    def waiting_line() -> str | None:
        """What the demo is waiting for, in words (None while the stream flows)."""
        if not svc.ready.is_set():
            why = svc.health.last_error
            return (f"  waiting for the broker at {where}: not connected"
                    + (f" ({why})" if why else "") + "; Ctrl-C ends the demo")
        if not svc.t.connected:
            return f"  not connected to {where} (reconnecting); Ctrl-C ends the demo"
        return None

    async def ticker() -> None:
        while True:
            await asyncio.sleep(every_s if dash is None else 0.2)
            if dash is not None and not dash.alive():
                stop.set()                    # q in the dashboard
            if view is None:
                stamp = format_epoch(clock())[11:19]
                print(f"[{stamp}] " + CAUTION.split(".")[0] + ".", file=out)
                w = waiting_line()
                if w:
                    print(w, file=out)
                for line in summary.lines():
                    print(line, file=out)
                out.flush()

    watch_task = asyncio.create_task(watch())
    tick_task = asyncio.create_task(ticker())
    sent = 0
    unreachable = None
    try:
        ready = asyncio.create_task(svc.ready.wait())
        stopped = asyncio.create_task(stop.wait())
        # without a connection the demo waits at most as long as its whole run would take
        give_up = (None if duration_s is None else
                   max(5.0, duration_s / speed + 5.0))
        done, _ = await asyncio.wait({ready, svc_task, stopped}, timeout=give_up,
                                     return_when=asyncio.FIRST_COMPLETED)
        for t in (ready, stopped):
            t.cancel()
        if not done:
            unreachable = (f"no connection to the broker at {where} within {give_up:g} s"
                           + (f" ({svc.health.last_error})" if svc.health.last_error else ""))
        if ready in done and not stop.is_set():
            if broker_url is None:
                sent = await _feed_inproc(broker, lines, clock, stop)
            else:
                pub = asyncio.create_task(publish_recording_lines(
                    lines, broker_url, speed, broker=cfg.broker, retime=False, stop=stop))
                s_done, _ = await asyncio.wait({pub, asyncio.create_task(stop.wait())},
                                               return_when=asyncio.FIRST_COMPLETED)
                if pub in s_done:
                    sent = pub.result().published
                else:
                    pub.cancel()
            # let the pipeline take in what was sent, then stop (or stop at once on Ctrl-C)
            deadline = time.monotonic() + 10
            while (not stop.is_set() and svc.health.received < sent
                   and time.monotonic() < deadline and not svc_task.done()):
                await asyncio.sleep(0.05)
    finally:
        if dash is not None:
            await asyncio.to_thread(dash.close, 5)
        svc.stop()
        code = await svc_task
        for task in (watch_task, tick_task):
            task.cancel()
        await asyncio.gather(watch_task, tick_task, return_exceptions=True)
        try:
            await watcher.disconnect()
        except Exception:  # noqa: BLE001
            pass
    h = svc.health
    result = {"exit": code or (1 if unreachable else 0), "sent": sent, "received": h.received, "stored": h.stored,
              "accepted": h.accepted, "duplicates": h.duplicates,
              "rejected": sum(h.rejected.values()), "db": db_url, "source": source,
              "fatal": svc.fatal or unreachable}
    if stop.is_set() and not svc.ready.is_set():
        print(f"demo stopped before it was connected to {where}"
              + (f" ({h.last_error})" if h.last_error else ""), file=out)
    for line in summary.lines():
        print(line, file=out)
    print(f"demo ended: {h.stored} messages stored ({h.accepted} accepted, "
          f"{sum(h.rejected.values())} rejected with a reason, {h.duplicates} duplicates "
          f"dropped).", file=out)
    print(f"The data is in {db_url}; look at it with:\n"
          f"  hemostream query derived --db {db_url} --limit 20\n"
          f"  hemostream query alarms --db {db_url}\n"
          f"  hemostream query rejected --db {db_url}", file=out)
    out.flush()
    return result
