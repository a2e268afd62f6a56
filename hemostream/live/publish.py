"""Publish recording lines (the wire format's JSON Lines, or the simulators' dicts) to a broker.

What a bedside gateway does, for the demo, the tests and ``simulate --publish``: each line's
payload goes to its topic at QoS 1, paced by the recording's arrival times, with times moved
to the present (a live hemostream rejects measurement times far from its own clock). The
publisher is at-least-once too: a message whose PUBACK has not come back when the connection
breaks is sent again after the reconnect, so the broker may see it twice; hemostream drops
the repeat by its wire format identity.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import logging
import signal
import sys
import time
import uuid
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Iterator

from ..config import load_config
from ..core.config import BrokerConfig
from ..core.wire import parse_time_or_none
from .mqtt import MqttTransport
from .retime import Retimer, close_gaps, map_times  # noqa: F401  (their old home)
from .service import backoff
from .transport import TransportError

log = logging.getLogger("hemostream.live.publish")


def as_record(line: Any) -> dict | None:
    """A recording line as a dict (from a dict, JSON text or bytes); None when unreadable."""
    if isinstance(line, dict):
        return line
    try:
        rec = json.loads(line)
    except (ValueError, TypeError):
        return None
    return rec if isinstance(rec, dict) else None


def payload_bytes(payload: Any) -> bytes:
    if isinstance(payload, str):
        return payload.encode("utf-8", "surrogateescape")
    return json.dumps(payload, separators=(",", ":")).encode()


@dataclass
class PublishSummary:
    lines: int = 0
    published: int = 0      # confirmed by the broker (PUBACK)
    resent: int = 0
    unreadable: int = 0
    reconnects: int = 0
    seconds: float = 0.0
    #: sent but never acknowledged by the broker when publishing ended (given up)
    unconfirmed: int = 0
    gave_up: bool = False
    #: ended by ``stop`` (a signal) before the end of the recording
    stopped: bool = False

    def words(self) -> str:
        """The counts in one sentence: what the broker acknowledged, what failed."""
        failed = self.lines - self.published
        return (f"{self.published} of {self.lines} messages acknowledged by the broker"
                + (f", {failed} NOT delivered ({self.unconfirmed} sent without an "
                   "acknowledgement)" if failed else "")
                + ("; the rest of the recording was not sent" if self.gave_up or self.stopped
                   else "")
                + (f"; {self.resent} resent after {self.reconnects} reconnect(s)"
                   if self.resent or self.reconnects else "")
                + (f"; {self.unreadable} unreadable line(s) skipped" if self.unreadable
                   else ""))


class Stopped(TransportError):
    """Publishing was stopped (a signal) before it had a connection."""


class PublishError(TransportError):
    """Publishing gave up; ``summary`` says what the broker had acknowledged by then."""

    def __init__(self, message: str, summary: PublishSummary) -> None:
        super().__init__(message)
        self.summary = summary


async def publish_recording_lines(lines_iter: Iterable[Any], url: str, speed: float | None = 1.0,
                                  *, broker: BrokerConfig | None = None, retime: bool = True,
                                  clock: Callable[[], float] = time.time,
                                  sleep: Callable[[float], Any] = asyncio.sleep,
                                  window: int = 200, stop: asyncio.Event | None = None,
                                  client_id: str | None = None,
                                  max_seconds_down: float = 120.0,
                                  on_wait: Callable[[str], None] | None = None
                                  ) -> PublishSummary:
    """Publish every line to ``url`` at QoS 1 and wait until the broker confirmed them all.

    ``speed``: N x real time by the lines' ``rx``; None or 0 publishes as fast as the window
    of ``window`` unconfirmed messages allows (times are then moved so the recording ends
    now). ``broker`` supplies credentials and TLS files (the URL overrides its ``url``).
    Gives up (TransportError) after ``max_seconds_down`` without a connection; while it has
    none, ``on_wait`` is told what it waits for (once a failed attempt). A set ``stop`` ends
    it at the next line, or during a wait for the broker.
    """
    base = broker or BrokerConfig()
    cfg = base.model_copy(update={"url": url, "client_id": client_id
                                  or f"hemostream-pub-{uuid.uuid4().hex[:8]}"})
    t = MqttTransport(cfg, persistent=False)
    summary = PublishSummary()
    paced = bool(speed)

    def readable(items: Iterable[Any]) -> Iterator[dict]:
        for x in items:
            r = as_record(x)
            if r is None or not isinstance(r.get("topic"), str) or "payload" not in r:
                summary.unreadable += 1
                continue
            summary.lines += 1
            yield r

    recs: Iterable[dict] = readable(lines_iter)
    if retime and paced:
        rt = Retimer(clock(), speed or 1.0)
        recs = (rt.record(r) for r in recs)
    elif retime:                    # as fast as possible: the recording ends now
        recs = list(recs)
        rxs = [t for t in (parse_time_or_none(r.get("rx")) for r in recs) if t is not None]
        rt = Retimer(clock() - ((rxs[-1] - rxs[0]) if rxs else 0.0))
        recs = [rt.record(r) for r in recs]
    t_start = time.monotonic()
    unconfirmed: list[tuple[Any, str, bytes]] = []
    watcher: asyncio.Task | None = None
    down_since: float | None = None
    attempt = 0

    async def watch() -> None:          # the message iterator raises when the link breaks
        try:
            async for _ in t.messages():
                pass
        except TransportError:
            pass

    async def ensure_connected() -> None:
        nonlocal watcher, down_since, attempt
        while not t.connected:
            if watcher is not None:
                watcher.cancel()
                watcher = None
                await t.drop()
            slow = (asyncio.get_running_loop().call_later(
                1.0, on_wait, f"waiting for the broker at {url}: connecting, no answer yet")
                if on_wait is not None else None)
            try:
                await t.connect()
            except TransportError as e:
                if e.refused:
                    raise
                if down_since is None:
                    down_since = time.monotonic()
                if time.monotonic() - down_since > max_seconds_down:
                    raise
                if on_wait is not None:
                    on_wait(f"waiting for the broker at {url}: not connected ({e}); giving "
                            f"up after {max_seconds_down:g} s without a connection")
                if stop is not None:
                    try:
                        await asyncio.wait_for(stop.wait(), backoff(attempt, 0.2, 5.0))
                    except asyncio.TimeoutError:
                        pass
                    if stop.is_set():
                        raise Stopped("stopped before a connection to the broker") from None
                else:
                    await asyncio.sleep(backoff(attempt, 0.2, 5.0))
                attempt += 1
                continue
            finally:
                if slow is not None:
                    slow.cancel()
            if summary.reconnects or down_since is not None:
                summary.reconnects += 1
            down_since, attempt = None, 0
            watcher = asyncio.create_task(watch())
            again = [(topic, data) for _, topic, data in unconfirmed]
            unconfirmed.clear()
            for topic, data in again:
                send(topic, data)
                summary.resent += 1

    def send(topic: str, data: bytes) -> None:
        h = t.publish(topic, data, 1, False)
        unconfirmed.append((h, topic, data))

    def prune() -> None:
        keep = [u for u in unconfirmed if u[0] is None or not t.published(u[0])]
        summary.published += len(unconfirmed) - len(keep)
        unconfirmed[:] = keep

    async def wait_window(limit: int) -> None:
        while True:
            prune()
            if any(u[0] is None for u in unconfirmed) or not t.connected:
                t.connected = False
                await ensure_connected()
                continue
            if len(unconfirmed) <= limit:
                return
            await asyncio.sleep(0.002)

    try:
        await ensure_connected()
        wall0 = time.monotonic()
        rx0 = None
        for rec in recs:
            if stop is not None and stop.is_set():
                summary.stopped = True
                summary.lines -= 1          # taken from the recording, but not sent
                break
            rx = parse_time_or_none(rec.get("rx")) if paced else None
            if rx is not None:      # a line without a valid arrival time goes out unpaced
                if rx0 is None:
                    rx0 = rx
                pace = 1.0 if retime else speed or 1.0
                delay = (rx - rx0) / pace - (time.monotonic() - wall0)
                if delay > 0:
                    await sleep(delay)
            await wait_window(window - 1)
            send(rec["topic"], payload_bytes(rec["payload"]))
        await wait_window(0)
    except (Stopped, asyncio.CancelledError):
        if stop is None or not stop.is_set():
            raise
        prune()
        summary.unconfirmed = len(unconfirmed)
        summary.stopped = True
    except TransportError as e:
        prune()
        summary.unconfirmed = len(unconfirmed)
        summary.gave_up = True
        raise PublishError(str(e), summary) from None
    finally:
        if watcher is not None:
            watcher.cancel()
        await t.disconnect()
        summary.seconds = time.monotonic() - t_start
    return summary


def publish_until_stopped(lines: Iterable[Any], url: str, speed: float | None, *,
                          give_up_s: float = 120.0, say: Callable[[str], None] = print,
                          broker: BrokerConfig | None = None) -> PublishSummary:
    """:func:`publish_recording_lines` for a command: Ctrl-C (SIGINT) and SIGTERM stop it
    within about a second, even while it waits for a broker that does not answer (the
    summary says ``stopped``); while there is no connection ``say`` is told what it waits for
    (at the first failed attempt, then every 10 s).

    Raises :class:`PublishError` when it gave up.
    """
    said: list[tuple[str, float]] = [("", 0.0)]       # the last words and when

    def waiting(text: str) -> None:
        now = time.monotonic()
        if text != said[0][0] or now - said[0][1] >= 10.0:
            say(text + "; Ctrl-C stops")
            said[0] = (text, now)

    async def main() -> PublishSummary:
        loop = asyncio.get_running_loop()
        stop = asyncio.Event()
        me = asyncio.current_task()

        def on_signal(name: str) -> None:
            if not stop.is_set():
                say(f"{name}: stopping (waiting at most a second for the broker's "
                    "acknowledgements)")
                stop.set()
                if me is not None:      # a connection attempt may hang: cut it short
                    loop.call_later(1.0, me.cancel)
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.add_signal_handler(sig, on_signal, sig.name)
        try:
            return await publish_recording_lines(lines, url, speed, broker=broker,
                                                 max_seconds_down=give_up_s, stop=stop,
                                                 on_wait=waiting)
        finally:
            for sig in (signal.SIGINT, signal.SIGTERM):
                loop.remove_signal_handler(sig)

    return asyncio.run(main())


def main(argv: list[str] | None = None) -> int:
    """``python -m hemostream.live.publish RECORDING URL [--speed N]``: a stand-in gateway."""
    p = argparse.ArgumentParser(prog="python -m hemostream.live.publish",
                                description="Publish a recording (JSON Lines) to a broker at "
                                "QoS 1, paced by its arrival times, times moved to now.")
    p.add_argument("recording", help="recording file, or - for standard input")
    p.add_argument("url", help="mqtt://host:port or mqtts://host:port")
    p.add_argument("--speed", type=float, default=1.0,
                   help="N x real time (0: as fast as possible)")
    p.add_argument("--config", metavar="FILE",
                   help="configuration whose [broker] section gives credentials and TLS files")
    args = p.parse_args(argv)
    broker = None
    if args.config:
        broker = load_config(args.config).broker
    f = sys.stdin.buffer if args.recording == "-" else open(args.recording, "rb")
    try:
        s = asyncio.run(publish_recording_lines(f, args.url, args.speed or None,
                                                broker=broker))
    except TransportError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
    finally:
        if f is not sys.stdin.buffer:
            f.close()
    print(f"published {s.published} of {s.lines} messages ({s.unreadable} unreadable lines "
          f"skipped, {s.resent} resent after {s.reconnects} reconnect(s)) in "
          f"{s.seconds:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
