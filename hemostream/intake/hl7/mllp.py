"""MLLP listener for HL7 v2 (IHE PCD-01) with original-mode acknowledgements.

    connection --MLLP frame--> handle(frame) --feed_hl7--> Processor --rows--> Writer thread
                                   ^ awaits the COMMIT of the batch holding the message
    connection <--ACK (MSA AA/AE/AR)-- only after that commit

An ACK is sent only once the message's rows (or its rejects) are committed, so a crash at any
point leaves the message unacknowledged and the sender retransmits it; the retransmission has
the same MSH-10 and times, so the core drops it as a duplicate (also after a restart: the
identities are reloaded from the database) and it is acknowledged AA.

Framing: <VT> message <FS><CR> (0x0b ... 0x1c 0x0d). Messages on one connection are taken
one at a time (original mode: the sender waits for each ACK); connections run concurrently.

Size: the listener, its ACK builder and the stand-alone runner belong together (the runner
is the listener's test harness and its smallest deployment).
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import signal
import ssl as _ssl
import sys
import time
import uuid
from datetime import datetime, timezone
from typing import Any, Awaitable, Callable

import hl7 as _hl7
from hl7.mllp import open_hl7_connection, start_hl7_server

from ...core.config import Config
from ...core.processor import Processor
from ...pipeline import make_rules
from ...store import Writer, load_resume, open_engine, rows_of
from .config import Hl7Config, load_config, split_host_port
from .mapping import ERROR_CODES, Outcome, feed_hl7, normalise

log = logging.getLogger("hemostream.hl7")

START, END = b"\x0b", b"\x1c\x0d"

Handler = Callable[[bytes], Awaitable[Outcome]]


def escape(text: str) -> str:
    """Text for an HL7 field with the default delimiters ``|^~\\&``."""
    return (text.replace("\\", "\\E\\").replace("|", "\\F\\").replace("^", "\\S\\")
            .replace("~", "\\R\\").replace("&", "\\T\\").replace("\r", " ").replace("\n", " "))


def build_ack(raw: bytes | str, outcome: Outcome, *, app: str = "hemostream",
              now: datetime | None = None) -> bytes:
    """The original-mode ACK for ``raw``: MSH, MSA (and ERR for AE/AR), HL7 v2.6 structure."""
    text = normalise(raw)
    f: list[str] = []
    if text.startswith("MSH") and len(text) > 8:
        f = text.split("\r", 1)[0].split(text[3])
        enc = f[1] if len(f) > 1 else "^~\\&"
        comp = enc[0] if enc else "^"
    else:
        comp = "^"

    def get(n: int) -> str:     # MSH-n, first component, re-escaped for the default delimiters
        i = n - 1
        return escape(f[i].split(comp)[0]) if len(f) > i else ""

    now = now or datetime.now(timezone.utc)
    trigger = ""
    if len(f) > 8:
        parts = f[8].split(comp)
        trigger = escape(parts[1]) if len(parts) > 1 else ""
    msh = ["MSH", "^~\\&", get(5) or app, get(6), get(3), get(4),
           now.strftime("%Y%m%d%H%M%S") + "+0000", "", f"ACK^{trigger}^ACK",
           uuid.uuid4().hex[:20], get(11) or "P", get(12) or "2.6"]
    cid = escape(outcome.control_id[:199]) if outcome.control_id else get(10)
    segs = ["|".join(msh), "|".join(["MSA", outcome.code, cid, escape(outcome.text[:80])])]
    if outcome.code != "AA":
        code, name = ERROR_CODES.get(outcome.category or "", ("207", "Application internal error"))
        segs.append("|".join(["ERR", "", "", f"{code}^{name}^HL70357", "E", "", "", "",
                              escape(outcome.text[:400])]))
    return ("\r".join(segs) + "\r").encode("utf-8")


class MllpServer:
    """Accepts MLLP connections and answers every frame with the ACK of ``handle``'s outcome.

    ``handle(frame_bytes)`` must return only once the message is committed (see
    :class:`Hl7Intake`); when it raises, the connection is closed without an ACK (the sender
    retransmits later).
    """

    def __init__(self, handle: Handler, cfg: Hl7Config | None = None, *,
                 ssl: _ssl.SSLContext | None = None) -> None:
        self.handle = handle
        self.cfg = cfg or Hl7Config()
        self.ssl = ssl
        self.server: asyncio.AbstractServer | None = None
        self.connections = 0
        self.refused = 0
        self.frames = 0
        self._tasks: set[asyncio.Task] = set()

    async def start(self, host: str, port: int) -> tuple[str, int]:
        """Bind and listen; returns the bound (host, port) (port 0 picks a free one)."""
        server = await start_hl7_server(self._client, host, port,
                                        limit=self.cfg.max_message_bytes + 8, ssl=self.ssl)
        self.server = server
        sock = server.sockets[0].getsockname()
        return sock[0], sock[1]

    async def close(self) -> None:
        if self.server is not None:
            self.server.close()
            await self.server.wait_closed()
        for t in list(self._tasks):
            t.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)

    async def _client(self, reader, writer) -> None:
        task = asyncio.current_task()
        if task is not None:
            self._tasks.add(task)
        peer = writer.get_extra_info("peername")
        if self.connections >= self.cfg.max_connections:
            self.refused += 1
            log.warning("HL7: refused a connection from %s: %d connections open (limit "
                        "[intake.hl7] max_connections)", peer, self.connections)
            writer.close()
            self._tasks.discard(task)
            return
        self.connections += 1
        try:
            await self._serve(reader, writer, peer)
        except (ConnectionError, asyncio.IncompleteReadError):
            pass
        except asyncio.CancelledError:
            pass
        except StoreFailed as e:
            log.error("HL7: closing the connection from %s without an ACK: %s", peer, e)
        except Exception as e:  # noqa: BLE001 - one connection must not end the listener
            log.error("HL7: internal error on the connection from %s (no ACK sent): %s: %s",
                      peer, e.__class__.__name__, e)
        finally:
            self.connections -= 1
            self._tasks.discard(task)
            writer.close()

    async def _serve(self, reader, writer, peer) -> None:
        cfg = self.cfg
        while True:
            try:
                frame = await asyncio.wait_for(reader.readuntil(END), cfg.idle_timeout_s)
            except asyncio.TimeoutError:
                log.info("HL7: closing the idle connection from %s", peer)
                return
            except asyncio.IncompleteReadError as e:
                if e.partial.strip():
                    log.info("HL7: %s closed the connection inside a frame (%d bytes "
                             "dropped, not acknowledged)", peer, len(e.partial))
                return
            except asyncio.LimitOverrunError:
                reason = (f"message larger than {cfg.max_message_bytes} bytes ([intake.hl7] "
                          "max_message_bytes); connection closed")
                writer.write(START + build_ack(b"", Outcome("AR", reason, "too_large")) + END)
                await writer.drain()
                log.info("HL7: %s sent a frame over the size limit; closed", peer)
                return
            start = frame.find(START)
            junk = frame[:start] if start >= 0 else frame[:-2]
            if start < 0 or junk.strip():
                out = Outcome("AR", "not an MLLP frame (expected <VT> message <FS><CR>)",
                              "unreadable")
                writer.write(START + build_ack(b"", out) + END)
                await writer.drain()
                continue
            body = frame[start + 1:-2]
            self.frames += 1
            outcome = await self.handle(body)
            writer.write(START + build_ack(body, outcome) + END)
            await writer.drain()


class StoreFailed(RuntimeError):
    pass


class Hl7Intake:
    """The ``handle`` of :class:`MllpServer`: feed the core, commit, then answer.

    Messages arriving together (several connections) share one transaction; each caller is
    resumed by the writer's commit callback. ``publish(topic, payload, retain)`` receives
    what the core produced for the live outputs (None: dropped - the standalone listener
    has no broker).
    """

    def __init__(self, proc: Processor, writer: Any, cfg: Hl7Config, *,
                 clock: Callable[[], float] = time.time,
                 publish: Callable[[str, Any, bool], None] | None = None) -> None:
        self.proc = proc
        self.writer = writer
        self.cfg = cfg
        self.clock = clock
        self.publish = publish
        self.outstanding = 0
        self._waiting: list[asyncio.Future] = []
        self._flush_scheduled = False
        self._loop: asyncio.AbstractEventLoop | None = None
        self._lock = asyncio.Lock()      # batches reach the writer in the order drained
        self.received = 0
        self.acked = {"AA": 0, "AE": 0, "AR": 0}

    async def handle(self, frame: bytes) -> Outcome:
        loop = self._loop = asyncio.get_running_loop()
        if self.writer.error is not None:
            raise StoreFailed(f"database writes failed: {self.writer.error}")
        self.received += 1
        outcome = feed_hl7(self.proc, frame, self.clock(), self.cfg, source="mllp")
        fut = loop.create_future()
        self._waiting.append(fut)
        if not self._flush_scheduled:
            self._flush_scheduled = True
            loop.call_soon(lambda: asyncio.ensure_future(self._flush()))
        await fut
        self.acked[outcome.code] = self.acked.get(outcome.code, 0) + 1
        if outcome.code != "AA":     # the category only: reasons may quote message content
            log.info("HL7 message %s answered %s (%s)", outcome.control_id[:40] or "-",
                     outcome.code, outcome.category)
        return outcome

    async def flush(self) -> None:
        """Hand everything the core produced so far to the writer (in order)."""
        async with self._lock:
            await self._flush_locked()

    async def _flush(self) -> None:
        async with self._lock:
            await self._flush_locked()

    async def _flush_locked(self) -> None:
        self._flush_scheduled = False
        waiting, self._waiting = self._waiting, []
        if not waiting and not self.proc.out.row_count() and not self.proc.out.publish:
            return
        out = self.proc.drain()
        if self.publish is not None:
            for topic, payload, retain in out.publish:
                self.publish(topic, payload, retain)
        rows = rows_of(out)
        loop = self._loop
        assert loop is not None               # set when the intake started

        def done() -> None:          # writer thread, after COMMIT
            loop.call_soon_threadsafe(_resolve, waiting)

        self.outstanding += 1
        try:
            if self.writer.q.full():
                await asyncio.to_thread(self.writer.submit, rows, done)
            else:
                self.writer.submit(rows, done)
        except Exception as e:  # noqa: BLE001
            for f in waiting:
                if not f.done():
                    f.set_exception(StoreFailed(str(e)))

    def check(self) -> None:
        """Fail the waiting callers when the writer has failed (no ACK goes out for them)."""
        err = self.writer.error
        if err is not None:
            waiting, self._waiting = self._waiting, []
            for f in waiting:
                if not f.done():
                    f.set_exception(StoreFailed(str(err)))


def _resolve(futs: list[asyncio.Future]) -> None:
    for f in futs:
        if not f.done():
            f.set_result(None)


class Hl7ServiceIntake:
    """The MLLP listener as an intake of the live service (``hemostream run --hl7-listen``).

    ``submit(feed)`` is the service's hook that runs ``feed(processor, rx)`` on its processing
    loop and returns once the batch holding the rows is committed (``Service.submit_external``,
    see docs/hl7.md); the service calls :meth:`start` once its processor and writer exist and
    :meth:`close` first thing when it stops.
    """

    def __init__(self, submit: Callable[[Callable[[Processor, float], Any]], Awaitable[Any]],
                 cfg: Hl7Config, listen: str, *, ssl: _ssl.SSLContext | None = None) -> None:
        self.submit = submit
        self.cfg = cfg
        self.listen = listen
        self.server = MllpServer(self.handle, cfg, ssl=ssl)
        self.bound: tuple[str, int] | None = None

    async def handle(self, frame: bytes) -> Outcome:
        cfg = self.cfg
        return await self.submit(lambda proc, rx: feed_hl7(proc, frame, rx, cfg, source="mllp"))

    async def start(self) -> None:
        self.bound = await self.server.start(*split_host_port(self.listen))
        log.info("HL7 MLLP listener on %s:%d", *self.bound)

    async def close(self) -> None:
        await self.server.close()


async def serve(db_url: str, host: str, port: int, *, config: Config | None = None,
                hl7_config: Hl7Config | None = None, ssl: _ssl.SSLContext | None = None,
                rules: Any = "default", stop: asyncio.Event | None = None,
                on_ready: Callable[[str, int], None] | None = None,
                publish: Callable[[str, Any, bool], None] | None = None) -> Hl7Intake:
    """Run a Processor + store behind an MLLP listener until ``stop`` is set (or cancelled).

    The stand-alone form of the intake (tests, a separate process); ``hemostream run`` would
    share its own processor and writer instead (see docs/hl7.md).
    """
    cfg = config or Config()
    hcfg = hl7_config or Hl7Config()
    engine = open_engine(db_url)
    resume = await asyncio.to_thread(load_resume, engine)
    proc = Processor(cfg, rules=make_rules(cfg) if rules == "default" else rules,
                     publish=publish is not None, next_ids=resume.next_ids,
                     known_beds=resume.beds, known_messages=resume.messages)
    writer = Writer(engine, max_batches=16)
    intake = Hl7Intake(proc, writer, hcfg, publish=publish)
    server = MllpServer(intake.handle, hcfg, ssl=ssl)
    stop = stop or asyncio.Event()
    bound = await server.start(host, port)
    log.info("HL7 MLLP listener on %s:%d (database %s)", bound[0], bound[1],
             db_url.split("@")[-1])
    if on_ready is not None:
        on_ready(*bound)
    try:
        while not stop.is_set():
            try:
                await asyncio.wait_for(stop.wait(), 1.0)
            except asyncio.TimeoutError:
                pass
            intake.check()
            if writer.error is not None:
                log.error("database writes failed, stopping (nothing unstored was "
                          "acknowledged): %s", writer.error)
                break
            proc.tick(time.time())
            if proc.out.row_count():       # time-driven rows (silent feeds ...)
                await intake.flush()
    finally:
        await server.close()
        try:
            if writer.error is None:
                await intake.flush()
            await asyncio.to_thread(writer.close)
        finally:
            engine.dispose()
    return intake


async def send_messages(host: str, port: int, messages: Any, *,
                        ssl: _ssl.SSLContext | None = None, ack_timeout_s: float = 30.0,
                        retries: int = 5, speed_delay: Callable[[int], float] | None = None
                        ) -> dict[str, int]:
    """Send HL7 messages (texts) over MLLP one at a time, each waiting for its ACK; on a lost
    connection or a missing ACK the message is sent again (at-least-once, as a gateway does;
    the listener drops the repeat as a duplicate). Returns the count of each MSA-1 code.
    For ``simulate --publish-hl7 HOST:PORT``."""
    counts: dict[str, int] = {}
    reader = writer = None
    for i, text in enumerate(messages):
        if speed_delay is not None:
            d = speed_delay(i)
            if d > 0:
                await asyncio.sleep(d)
        for attempt in range(retries + 1):
            try:
                if writer is None:
                    reader, writer = await open_hl7_connection(host, port, ssl=ssl)
                assert reader is not None
                writer.writeblock(text.encode("utf-8"))
                await writer.drain()
                ack = await asyncio.wait_for(reader.readblock(), ack_timeout_s)
                code = str(_hl7.parse(ack.decode("utf-8", "replace")).segment("MSA")(1))
                counts[code] = counts.get(code, 0) + 1
                break
            except (OSError, asyncio.IncompleteReadError, asyncio.TimeoutError) as e:
                if writer is not None:
                    writer.close()
                reader = writer = None
                if attempt == retries:
                    raise ConnectionError(f"HL7 message {i + 1}: no ACK after "
                                          f"{retries + 1} attempts ({e})") from None
                await asyncio.sleep(min(0.2 * 2 ** attempt, 5.0))
    if writer is not None:
        writer.close()
    return counts


def main(argv: list[str] | None = None) -> int:
    """``python -m hemostream.intake.hl7.mllp --db URL --listen HOST:PORT [--config FILE]``"""
    ap = argparse.ArgumentParser(prog="python -m hemostream.intake.hl7.mllp",
                                 description="HL7 v2 MLLP listener into a hemostream store")
    ap.add_argument("--db", required=True, help="database URL")
    ap.add_argument("--listen", default=None, help="HOST:PORT (default [intake.hl7] listen)")
    ap.add_argument("--config", default=None, help="TOML configuration file")
    ap.add_argument("--locations-from-components", action="store_true")
    ap.add_argument("--tls-cert", default=None)
    ap.add_argument("--tls-key", default=None)
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s",
                        stream=sys.stderr)
    cfg, hcfg = load_config(args.config)
    if args.locations_from_components:
        hcfg = hcfg.model_copy(update={"locations_from_components": True})
    listen = args.listen or hcfg.listen
    if not listen:
        ap.error("no --listen and no [intake.hl7] listen")
    host, port = split_host_port(listen)
    ctx = None
    if args.tls_cert:
        ctx = _ssl.create_default_context(_ssl.Purpose.CLIENT_AUTH)
        ctx.load_cert_chain(args.tls_cert, args.tls_key)

    async def run() -> None:
        stop = asyncio.Event()
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.add_signal_handler(sig, stop.set)

        def ready(h: str, p: int) -> None:
            print(f"listening {h}:{p}", flush=True)

        await serve(args.db, host, port, config=cfg, hl7_config=hcfg, ssl=ctx, stop=stop,
                    on_ready=ready)

    try:
        asyncio.run(run())
    except Exception as e:  # noqa: BLE001 - StoreError and the like: say it, exit 1
        log.error("%s: %s", e.__class__.__name__, e)
        return 1
    return 0


if __name__ == "__main__":   # pragma: no cover
    sys.exit(main())
