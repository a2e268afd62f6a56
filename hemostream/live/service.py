"""The live pipeline: a transport (real broker or in-process) -> the core -> the database.

Size: the service's one event loop with its stages (intake, queue, flush, publish, health);
to be split by stage (issue 16).

Flow and the at-least-once contract (MQTT 5.0 section 4.3.2, QoS 1):

    transport --Incoming--> bounded queue --> Processor.feed (event loop, single thread)
        every flush_every_s or flush_messages: Processor.drain()
            -> publish the outputs (derived, alarm events, retained alarm state)
            -> Writer.submit(rows, on_done)            (writer thread, one transaction)
                 on_done, after COMMIT -> loop: transport.ack(message) for every message
                                                 of the batch, in arrival order

A message is acknowledged to the broker only after the transaction holding its rows (or its
reject, or nothing at all for a duplicate) has committed, so a crash at any point leaves it
unacknowledged and the broker delivers it again; the redelivery is recognised by the wire
format identity (device, seq, time) - also after a restart, from the database - and dropped.
Back-pressure: the writer's queue is bounded (submit waits), the receive queue is bounded
(the reader waits) and the broker sends at most ``receive_maximum`` unacknowledged messages,
so a slow database slows the broker's delivery instead of growing memory or dropping input.
"""

from __future__ import annotations

import asyncio
import json
import logging
import random
import time
from collections import deque
from dataclasses import dataclass
from typing import Any, Callable, Literal

from sqlalchemy import event
from sqlalchemy.engine import make_url

from ..core.config import Config
from ..core.processor import Processor
from ..core.rules.protocol import RulesLayer
from ..core.wire import encode, format_epoch, input_filters
from ..core.wire import status_topic as instance_status_topic
from ..pipeline import make_rules
from ..runtime import settle_gc
from ..store import StoreError, Writer, load_resume, open_engine, record_config, rows_of
from ..store.retention import prune as prune_store
from .health import Health, log_line, status_payload
from .transport import Incoming, Transport, TransportError

log = logging.getLogger("hemostream.live")

_TICK = object()
_STOP = object()


@dataclass
class External:
    """Input from another intake (the HL7 MLLP listener): ``feed(processor, rx)`` runs on the
    processing loop; ``done`` resolves once the batch holding its rows is committed."""

    feed: Callable[[Processor, float], Any]
    done: asyncio.Future
    rx: float
    result: Any = None


def subscription_filters(cfg: Config) -> list[str]:
    """The input topics of the units this instance serves (every unit when none is named).

    >>> subscription_filters(Config())[:2]
    ['hemo/+/+/obs', 'hemo/+/+/admit']
    """
    units = [u.id for u in cfg.units] or ["+"]
    return [f for u in units for f in input_filters(u)]


def status_topic(cfg: Config) -> str:
    """This instance's status / health topic."""
    return instance_status_topic(cfg.instance)


def backoff(attempt: int, low: float, high: float, rnd: random.Random = random.Random()) -> float:
    """Exponential back-off with jitter: the cap doubles from ``low`` to ``high`` and the delay
    is drawn between half the cap and the cap ("equal jitter", common practice), so many
    clients restarting together do not reconnect in lockstep.

    >>> all(0.25 <= backoff(0, 0.5, 30) <= 0.5 for _ in range(100))
    True
    >>> all(15 <= backoff(20, 0.5, 30) <= 30 for _ in range(100))
    True
    """
    cap = min(high, low * (2 ** min(attempt, 30)))
    return cap / 2 + rnd.uniform(0, cap / 2)


def sqlite_synchronous(engine, mode: str) -> None:
    """Apply ``PRAGMA synchronous`` to every connection of a SQLite engine (after the store's
    own pragmas, so it wins), and drop connections opened before."""
    if engine.dialect.name != "sqlite":
        return

    @event.listens_for(engine, "connect")
    def _sync(dbapi_conn, _rec):
        cur = dbapi_conn.cursor()
        cur.execute(f"PRAGMA synchronous={mode.upper()}")
        cur.close()

    engine.dispose()


class Outbox:
    """Publishes what the core produced, and decides what happens while the broker is away.

    - Retained messages (each bed's alarm state, the service status): the latest per topic is
      kept and republished on every (re)connect, so the broker always ends up current.
    - Alarm lifecycle events: kept until the broker confirmed them (PUBACK); those not
      confirmed when the connection broke, and those made while it was down, are sent after
      the reconnect, oldest first, up to ``broker.offline_events`` (beyond: counted as shed).
    - Derived values: a live stream only; while the broker is away they are counted as shed
      (they are stored, and recomputable from the stored observations).
    """

    def __init__(self, transport: Transport, health: Health, max_events: int,
                 derived_qos: int = 0) -> None:
        self.t = transport
        self.derived_qos = derived_qos
        self.health = health
        self.max_events = max_events
        self.retained: dict[str, bytes] = {}
        self.waiting: deque[tuple[str, bytes]] = deque()
        self.unconfirmed: list[tuple[Any, str, bytes]] = []

    @staticmethod
    def encode(payload: Any) -> bytes:
        if isinstance(payload, bytes):
            return payload
        return json.dumps(payload, separators=(",", ":"), default=str).encode()

    def put(self, topic: str, payload: Any, retain: bool) -> None:
        data = self.encode(payload)
        t = self.t
        if retain:
            self.retained[topic] = data
            if t.connected:
                t.publish(topic, data, 1, True)   # a lost one is republished on reconnect
            return
        if topic.endswith("/derived"):
            if t.connected and t.publish(topic, data, self.derived_qos, False) is not None:
                self.health.derived_published += 1
            else:
                self.health.shed["derived_while_offline"] += 1
            return
        if t.connected and not self.waiting:
            h = t.publish(topic, data, 1, False)
            if h is not None:
                self.unconfirmed.append((h, topic, data))
                return
        self._wait(topic, data)

    def _wait(self, topic: str, data: bytes) -> None:
        if self.max_events == 0:
            self.health.shed["alarm_events_while_offline"] += 1
            return
        if len(self.waiting) >= self.max_events:
            self.waiting.popleft()
            self.health.shed["alarm_events_while_offline"] += 1
        self.waiting.append((topic, data))

    def prune(self) -> None:
        if self.unconfirmed:
            self.unconfirmed = [u for u in self.unconfirmed if not self.t.published(u[0])]

    def offline(self) -> None:
        """The connection broke: what it had not confirmed goes first in line again."""
        back = [(topic, data) for h, topic, data in self.unconfirmed if not self.t.published(h)]
        self.unconfirmed = []
        self.waiting.extendleft(reversed(back))
        while len(self.waiting) > max(self.max_events, 0):
            self.waiting.popleft()
            self.health.shed["alarm_events_while_offline"] += 1

    def online(self) -> None:
        """A (re)connect: send waiting events, then every retained message's latest value."""
        t = self.t
        while self.waiting and t.connected:
            topic, data = self.waiting[0]
            h = t.publish(topic, data, 1, False)
            if h is None:
                break
            self.waiting.popleft()
            self.unconfirmed.append((h, topic, data))
        for topic, data in self.retained.items():
            t.publish(topic, data, 1, True)


class Service:
    """``hemostream run`` (and the demo): run until :meth:`stop`, then shut down cleanly."""

    def __init__(self, cfg: Config, transport: Transport, *, db_url: str | None = None,
                 rules: RulesLayer | None | Literal["default"] = "default",
                 clock: Callable[[], float] = time.time,
                 log_health: bool = True,
                 on_health: Callable[[dict], None] | None = None) -> None:
        self.cfg = cfg
        self.t = transport
        self.db_url = db_url or cfg.store.url
        self.rules = make_rules(cfg) if rules == "default" else rules
        self.clock = clock
        self.log_health = log_health
        self.on_health = on_health
        self.filters = subscription_filters(cfg)
        self.status_topic = status_topic(cfg)
        self.health = Health(cfg.instance, started=clock())
        self.outbox = Outbox(transport, self.health, cfg.broker.offline_events,
                             cfg.broker.derived_qos)
        self.fatal: str | None = None
        self.proc: Processor | None = None
        self.writer: Writer | None = None
        self.last_health: dict | None = None
        self._stop = asyncio.Event()
        self.ready = asyncio.Event()        # set once subscribed the first time
        self._outstanding = 0               # batches submitted, not yet committed
        self._committed_evt = asyncio.Event()
        self._dropped: bool | None = None    # a working connection was lost (taken over?)
        #: (time, arrival-to-commit seconds) of the last committed batch
        self.last_commit: tuple[float, float] | None = None
        #: other intakes (objects with async start() / close()), e.g. the HL7 MLLP listener
        self.intakes: list[Any] = []
        self._external: set[asyncio.Future] = set()

    # ------------------------------------------------------------------ control

    def stop(self) -> None:
        self._stop.set()

    async def submit_external(self, feed: Callable[[Processor, float], Any]) -> Any:
        """Run ``feed(processor, rx)`` on the processing loop and return its result once the
        rows it produced are committed (raises when they cannot be: the caller must not
        acknowledge its input then)."""
        if self._stop.is_set() or self.fatal is not None:
            raise RuntimeError(self.fatal or "the service is stopping")
        item = External(feed, self._loop.create_future(), self.clock())
        self._external.add(item.done)
        self.health.received += 1
        await self.inq.put(item)
        try:
            await item.done
        finally:
            self._external.discard(item.done)
        return item.result

    def _fail(self, message: str) -> None:
        if self.fatal is None:
            self.fatal = message
            log.error("%s", message)
        self._stop.set()

    async def _sleep_or_stop(self, seconds: float) -> bool:
        try:
            await asyncio.wait_for(self._stop.wait(), seconds)
            return True
        except asyncio.TimeoutError:
            return False

    # ------------------------------------------------------------------ run

    async def run(self) -> int:
        """0 after a clean stop, 1 when it had to stop (database failure, refused login)."""
        cfg = self.cfg
        b = cfg.broker
        self._loop = asyncio.get_running_loop()
        try:
            engine = open_engine(self.db_url)
        except StoreError as e:
            log.error("%s", e)
            return 1
        sqlite_synchronous(engine, cfg.store.sqlite_synchronous)
        known = await self.prepare(engine)
        settle_gc()                        # hemostream/runtime.py: the state is built
        self.inq: asyncio.Queue = asyncio.Queue(b.queue_size)
        log.info("hemostream %s: database %s, %s, subscribing to %s", cfg.instance,
                 _safe_url(self.db_url), known, ", ".join(self.filters))
        for intake in self.intakes:
            await intake.start()
        conn = asyncio.create_task(self._connection_loop(), name="hemostream-connection")
        proc = asyncio.create_task(self._process_loop(), name="hemostream-process")
        tick = asyncio.create_task(self._ticker(), name="hemostream-ticker")
        stop = asyncio.create_task(self._stop.wait())
        try:
            done, _ = await asyncio.wait({conn, proc, tick, stop},
                                         return_when=asyncio.FIRST_COMPLETED)
            for task in done:
                if task is not stop and not task.cancelled() and task.exception():
                    self._fail(f"internal error in {task.get_name()}: "
                               f"{task.exception().__class__.__name__}: {task.exception()}")
        finally:
            await self._shutdown(conn, proc, tick, stop, engine)
        return 1 if self.fatal else 0

    async def prepare(self, engine) -> str:
        """Build the processor (resumed from the database) and the writer over ``engine``;
        returns what is known, for the log. (The workers' per-unit service builds its own.)"""
        cfg = self.cfg
        await asyncio.to_thread(record_config, engine, cfg)   # the configuration in force
        resume = await asyncio.to_thread(load_resume, engine)
        self.proc = Processor(cfg, rules=self.rules, next_ids=resume.next_ids,
                              known_beds=resume.beds, known_messages=resume.messages,
                              known_retained_rejects=resume.retained_rejects)
        self.writer = Writer(engine, max_batches=16, store_cfg=cfg.store)
        return (f"{len(resume.beds)} bed(s) and {len(resume.messages)} recent message "
                "identities known")

    async def _shutdown(self, conn, proc, tick, stop, engine) -> None:
        log.info("stopping: no more messages taken; flushing the database")
        for intake in self.intakes:
            await intake.close()
        for task in (conn, tick, stop):
            task.cancel()
        await asyncio.gather(conn, tick, stop, return_exceptions=True)
        if not proc.done():
            await self.inq.put(_STOP)
            try:
                await proc
            except Exception as e:  # noqa: BLE001
                self._fail(f"database: {e}")
        writer = self.writer
        try:
            await asyncio.wait_for(asyncio.to_thread(writer.flush),
                                   self.cfg.store.shutdown_wait_s)
        except asyncio.TimeoutError:
            writer.give_up()        # the database is away: what is unwritten stays unacked
            self._fail(f"the database did not take the last batches within "
                       f"{self.cfg.store.shutdown_wait_s:g} s ({writer.trouble}); they were "
                       f"not acknowledged, so the broker delivers them again")
        except StoreError as e:
            self._fail(str(e))
        # the commit callbacks hop back to this loop: let them run, so the acks go out
        deadline = time.monotonic() + 5
        while self._outstanding > 0 and writer.error is None and time.monotonic() < deadline:
            self._committed_evt.clear()
            try:
                await asyncio.wait_for(self._committed_evt.wait(), 0.2)
            except asyncio.TimeoutError:
                pass
        if self.t.connected:
            reason = "stopped" if self.fatal is None else "failed"
            try:
                await self.t.publish_wait(self.status_topic, status_payload(
                    self.cfg.instance, "offline", self.clock(), reason=reason), 1, True)
            except TransportError as e:
                log.warning("could not publish the offline status: %s", e)
        await self.t.disconnect()
        try:
            await asyncio.to_thread(writer.close)
        except StoreError as e:
            self._fail(str(e))
        for f in list(self._external):      # not committed: their senders get no ACK
            if not f.done():
                f.set_exception(RuntimeError(self.fatal or "stopped before the commit"))
        engine.dispose()
        h = self.health
        log.info("stopped: %d message(s) received, %d stored, %d duplicate(s) dropped, "
                 "%d rejected; data in %s", h.received, h.stored, h.duplicates,
                 sum(h.rejected.values()), _safe_url(self.db_url))

    # ------------------------------------------------------------------ tasks

    async def _connection_loop(self) -> None:
        b = self.cfg.broker
        attempt = 0
        while not self._stop.is_set():
            try:
                session = await self.t.connect()
            except TransportError as e:
                self.health.went_down(self.clock(), str(e))
                if e.refused and self.health.connects == 0:
                    self._fail(f"{e} - check broker.username and the password source "
                               "(broker.password_env / broker.password_file)")
                    return
                delay = backoff(attempt, b.reconnect_min_s, b.reconnect_max_s)
                attempt += 1
                log.warning("broker not reachable (%s); retrying in %.1f s", e, delay)
                if await self._sleep_or_stop(delay):
                    return
                continue
            if attempt == 0 and self._dropped is not None:
                # the broker closed a working connection yet took the very next one: that is
                # what a session takeover looks like (when the broker does not say so)
                self._taken_over(certain=self._dropped)
            self._dropped = None
            attempt = 0
            gap = self.health.came_up(self.clock())
            try:
                await self.t.subscribe(self.filters, 1)
                if gap:
                    log.warning("broker connection back after %.1f s; %s", gap,
                                "session resumed" if session else
                                "the broker had NO session for us: messages sent meanwhile "
                                "were not kept (check its persistence and session expiry)")
                else:
                    log.info("connected to the broker (%s session)",
                             "resumed" if session else "new")
                self.outbox.retained[self.status_topic] = status_payload(
                    self.cfg.instance, "online", self.clock(), since=format_epoch(self.health.started))
                self.outbox.online()
                self.ready.set()
                async for m in self.t.messages():
                    self.health.received += 1
                    await self.inq.put(m)
            except TransportError as e:
                if e.refused:
                    self._fail(str(e))
                    return
                self.health.went_down(self.clock(), str(e))
                self._dropped = bool(getattr(self.t, "taken_over", False))
                left = self.t.leftover()
                log.warning("broker connection lost (%s); reconnecting; processing the %d "
                            "message(s) already received (they stay unacknowledged and "
                            "come again)", e, len(left))
                self.outbox.offline()
                drop = getattr(self.t, "drop", None)
                if drop is not None:
                    await drop()
                for m in left:
                    self.health.received += 1
                    await self.inq.put(m)
                if await self._sleep_or_stop(backoff(0, b.reconnect_min_s,
                                                     b.reconnect_max_s)):
                    return

    def _taken_over(self, certain: bool) -> None:
        """Another client connected with this service's client id and took its session (the
        broker said so, ``certain``, or closed a working connection and took the next one at
        once): the service takes it back, but a client doing it again and again keeps every
        bed of the unit from being monitored. Say so, loudly."""
        now = self.clock()
        h = self.health
        h.takeovers.append(now)
        recent = [t for t in h.takeovers if now - t <= 600]
        h.takeovers[:] = recent[-100:]
        cid = self.cfg.broker.client_id
        if len(recent) >= 3:
            log.critical("the MQTT session of client id %r was taken over %d times in 10 "
                         "minutes: another client is using this service's client id, and "
                         "messages of every bed may be lost meanwhile. Find that client; "
                         "bind the client id to the service's user on the broker "
                         "(configs/mosquitto/secure.conf: use_username_as_clientid)",
                         cid, len(recent))
        elif certain:
            log.error("another client connected with this service's client id %r and took "
                      "its session over (MQTT reason 142); reconnected", cid)
        else:
            log.error("the broker closed the connection of client id %r although it is "
                      "reachable: another client may have connected with this id and taken "
                      "its session over; reconnected", cid)

    async def _process_loop(self) -> None:
        b = self.cfg.broker
        proc = self.proc
        flush_n = b.flush_messages
        flush_every = b.flush_every_s
        batch_rows = self.cfg.store.batch_rows
        batch: list[Incoming] = []
        mono = time.monotonic
        next_flush = mono() + flush_every
        # the rules' clock ticks every flush interval (50 ms): a delay a sample just misses
        # (its sender's clock a few ms short) is settled then, not up to a second later;
        # a tick with nothing due is one look at the top of a heap
        tick_every = flush_every
        next_tick = mono() + tick_every
        last_rx: float | None = None        # arrival time of the newest message processed
        ticked = float("-inf")
        while True:
            item = await self.inq.get()
            if item is _STOP:
                break
            if item is not _TICK:
                if isinstance(item, External):
                    item.result = item.feed(proc, item.rx)
                else:
                    proc.feed(item.topic, item.payload, item.rx, retained=item.retain)
                last_rx = item.rx
                batch.append(item)
            now = mono()
            if now >= next_tick:
                # behind the stream (messages still queued), time is where the processing
                # is, as in a replay: a wall-clock tick would settle delays on state that is
                # seconds old (an excursion shorter than its delay, whose end is still
                # queued, would raise). Caught up, it is the clock (silent feeds).
                t = self.clock()
                if last_rx is not None and not self.inq.empty():
                    t = max(min(t, last_rx), ticked)
                proc.tick(t)
                ticked = t
                next_tick = now + tick_every
            out = proc.out
            if (len(batch) >= flush_n or out.row_count() >= batch_rows
                    or (now >= next_flush and (batch or out.row_count() or out.publish))):
                await self._flush(batch)
                batch = []
                next_flush = now + flush_every
        proc.tick(self.clock())
        await self._flush(batch)

    async def _flush(self, batch: list[Incoming]) -> None:
        out = self.proc.drain()
        for topic, payload, retain in out.publish:
            self.outbox.put(topic, payload, retain)
        self.health.outputs(out)
        if out.rejected:
            for r in out.rejected:   # bed ids and categories only: reasons may quote content
                log.info("rejected a message on %r: %s", r["topic"], r["category"])
                log.debug("rejected on %r: %s", r["topic"], r["reason"])
        rows = rows_of(out)
        if not rows and not batch:
            return
        acks = [(m.generation, m.mid, m.qos) for m in batch if not isinstance(m, External)]
        externals = [m.done for m in batch if isinstance(m, External)]
        oldest = min((m.rx for m in batch), default=self.clock())
        loop = self._loop
        n = len(batch)

        def on_done() -> None:   # writer thread, after COMMIT
            loop.call_soon_threadsafe(self._committed, acks, n, oldest, externals)

        writer = self.writer
        self._outstanding += 1
        try:
            if writer.q.full():
                await asyncio.to_thread(writer.submit, rows, on_done)
            else:
                writer.submit(rows, on_done)
        except StoreError as e:
            self._outstanding -= 1
            self._fail(f"database writes failed, stopping (nothing unstored was "
                       f"acknowledged): {e}")
            raise

    def _committed(self, acks: list[tuple[int, int, int]], n: int, oldest_rx: float,
                   externals: list[asyncio.Future] = ()) -> None:
        self._outstanding -= 1
        for f in externals:
            if not f.done():
                f.set_result(None)
        h = self.health
        ack = self.t.ack
        for gen, mid, qos in acks:
            if ack(gen, mid, qos):
                h.acked += 1
            else:
                h.stale_acks += 1
        now = self.clock()
        h.committed(n, now - oldest_rx, self.writer.last_latency_s)
        self.last_commit = (now, now - oldest_rx)     # when, and arrival-to-commit lag (s)
        self._committed_evt.set()

    async def _ticker(self) -> None:
        b = self.cfg.broker
        next_health = time.monotonic() + b.health_every_s
        while True:
            await asyncio.sleep(b.flush_every_s)
            if not self.inq.full():
                self.inq.put_nowait(_TICK)
            if self.writer.error is not None:
                self._fail(f"database writes failed, stopping (nothing unstored was "
                           f"acknowledged): {self.writer.error.__class__.__name__}")
                return
            self.outbox.prune()
            self._maybe_prune()
            if time.monotonic() >= next_health:
                next_health += b.health_every_s
                self.publish_health()

    def _maybe_prune(self) -> None:
        """Retention ([store.retention]): prune every prune_every_s, first after one
        interval, on a worker thread (hemostream.store.retention)."""
        every = self.cfg.store.retention.prune_every_s
        now = time.monotonic()
        nxt = getattr(self, "_next_prune", None)
        if not every or getattr(self, "_pruning", None) is not None and not self._pruning.done():
            return
        if nxt is None:
            self._next_prune = now + every
            return
        if now >= nxt:
            self._next_prune = now + every
            self._pruning = asyncio.ensure_future(asyncio.to_thread(self._prune_once))

    def _prune_once(self) -> None:
        try:
            rep = prune_store(self.writer.engine, self.cfg.store.retention, self.clock())
        except Exception as e:  # noqa: BLE001 - tried again at the next interval
            log.warning("pruning failed, will try again: %s", e.__class__.__name__)
            return
        if rep.removed:
            log.info("pruned past retention: %s", ", ".join(
                f"{n} {k}" for k, n in sorted(rep.removed.items())))

    def publish_health(self) -> dict:
        h = self.health
        d = h.report(self.clock(), self.inq.qsize(), self.inq.maxsize,
                     h.received - h.stored, self.writer.q.qsize())
        w = self.writer
        d["database"] = {"state": "waiting" if w.trouble else "ok", "reason": w.trouble,
                         "waiting_s": (round(self.clock() - w.trouble_since, 1)
                                       if w.trouble_since else 0.0),
                         "retries": w.retries, "refused_messages": w.refused}
        self.last_health = d
        if self.t.connected:
            self.t.publish(self.status_topic, encode(d), 1, False)
        if self.log_health:
            log.info("%s", log_line(d))
        if self.on_health is not None:
            self.on_health(d)
        return d


def _safe_url(url: str) -> str:
    """A database URL without its password, for the log."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001
        return "<database>"
