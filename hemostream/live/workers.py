"""Several workers sharing the units (``[workers] enabled = true``; docs/workers.md).

Each worker runs one :class:`UnitService` per unit it holds a lease on (:mod:`.leases`):
the ordinary live service narrowed to that unit, with its own MQTT session (client id
``<broker.client_id>-<unit>``, persistent), its own database engine and writer, and a write
guard that fences it off the moment the lease moves. Every ``check_every_s`` the
:class:`Pool` renews its leases, counts the live workers, gives up units beyond its share
(after their last batch committed and was acknowledged, then the lease row is deleted) and
claims free or expired ones up to its share.

Taking a unit over: the new owner reads the unit's recent past from the database
(:func:`hemostream.store.history.unit_past`), feeds it through a fresh processor without
storing or publishing (trend windows, alarm states, latest values as the old owner left
them at its last commit), learns the identities of those messages, and only then connects
with the unit's client id: the broker hands it the session, with everything queued while
no one owned the unit and everything the old owner had not acknowledged. What the old owner
had stored but not acknowledged comes again and is dropped as a duplicate.
"""

from __future__ import annotations

import asyncio
import logging
import os
import socket
import time
from dataclasses import dataclass
from typing import Any, Callable

from ..core.config import Config
from ..core.processor import Processor
from ..pipeline import make_rules
from ..runtime import settle_gc
from ..store import Writer, open_engine, record_config
from ..store.history import unit_past
from .leases import Leases, id_base, share
from .service import Service
from .transport import Transport

log = logging.getLogger("hemostream.live.workers")


def worker_name(cfg: Config) -> str:
    return cfg.workers.name or f"{socket.gethostname()}-{os.getpid()}"


def unit_config(cfg: Config, unit_id: str) -> Config:
    """The configuration of one unit's service: that unit only, its own client id and
    instance name (so its status topic and will are its own)."""
    unit = next(u for u in cfg.units if u.id == unit_id)
    b = cfg.broker.model_copy(update={"client_id": f"{cfg.broker.client_id}-{unit_id}"})
    return cfg.model_copy(update={"units": [unit], "broker": b,
                                  "instance": f"{cfg.instance}-{unit_id}"})


def open_shared(url: str):
    """``open_engine`` while holding a PostgreSQL advisory lock, so workers starting together
    on an empty database do not all create its tables at once."""
    from sqlalchemy import create_engine, text

    if not url.startswith("postgresql"):
        return open_engine(url)
    raw = create_engine(url)
    try:
        with raw.connect() as conn:
            conn.execute(text("SELECT pg_advisory_lock(72057)"))
            try:
                return open_engine(url)
            finally:
                conn.execute(text("SELECT pg_advisory_unlock(72057)"))
    finally:
        raw.dispose()


class UnitService(Service):
    """The live service of one unit under a lease (see the module text)."""

    def __init__(self, cfg: Config, transport: Transport, *, db_url: str, token: int,
                 full_config: Config, **kw: Any) -> None:
        super().__init__(cfg, transport, db_url=db_url, **kw)
        self.unit = cfg.units[0].id
        self.token = token
        self.full_config = full_config
        self.rebuilt = 0

    async def prepare(self, engine) -> str:
        cfg = self.cfg
        await asyncio.to_thread(record_config, engine, self.full_config)

        def read():
            with engine.connect() as conn:
                return unit_past(conn, self.unit, cfg.workers.rebuild_s)

        past = await asyncio.to_thread(read)
        proc = Processor(cfg, rules=self.rules, next_ids=id_base(self.token),
                         known_beds=past.beds)
        book = getattr(self.rules, "book", None)
        if book is not None and hasattr(book, "seed_ids"):
            book.seed_ids(past.alarm_counts)
        tick_at = None
        for rx, topic, payload in past.messages:   # as the old owner saw them, ticks too
            if tick_at is None or rx >= tick_at + 1.0:
                if tick_at is not None:
                    proc.tick(rx)
                tick_at = rx
            proc.feed(topic, payload, rx)
        proc.drain()                               # stored already; published already
        for key, ident in past.identities:
            proc.dedup.check_and_add(key, ident)
        proc.counters = type(proc.counters)()
        self.rebuilt = len(past.messages)
        self.proc = proc
        self.writer = Writer(engine, max_batches=16, store_cfg=cfg.store)
        self.writer.guard = Leases.guard(self.unit, self.token)
        return (f"unit {self.unit} (lease token {self.token}): {len(past.beds)} bed(s), "
                f"{len(past.messages)} stored message(s) fed again to rebuild its state")


@dataclass
class Held:
    token: int
    service: UnitService
    task: asyncio.Task
    since: float


class Pool:
    """One worker: holds its share of the configured units by lease (see the module text).

    ``make_transport(unit_cfg)`` builds the MQTT transport of one unit's service."""

    def __init__(self, cfg: Config, make_transport: Callable[[Config], Transport], *,
                 db_url: str | None = None, name: str | None = None) -> None:
        if not cfg.units:
            raise ValueError("workers share the configured units: list them as [[units]]")
        self.cfg = cfg
        self.db_url = db_url or cfg.store.url
        self.name = name or worker_name(cfg)
        self.make_transport = make_transport
        self.units = [u.id for u in cfg.units]
        self.held: dict[str, Held] = {}
        self.failed = False
        self._stop = asyncio.Event()
        #: (unit, event, monotonic time) of claims and releases, for tests and the log
        self.history: list[tuple[str, str, float]] = []
        self._checks = 0

    def stop(self) -> None:
        self._stop.set()

    async def run(self) -> int:
        w = self.cfg.workers
        try:
            engine = await asyncio.to_thread(open_shared, self.db_url)
            leases = Leases(engine, self.name, w.lease_s)
        except Exception as e:  # noqa: BLE001 - StoreError, not PostgreSQL
            log.error("%s", e)
            return 1
        log.info("worker %s: sharing %d unit(s) with the other workers on this database "
                 "(lease %.0f s, checked every %.1f s)", self.name, len(self.units),
                 w.lease_s, w.check_every_s)
        settle_gc()                        # hemostream/runtime.py
        last_ok = time.monotonic()
        try:
            while not self._stop.is_set():
                try:
                    await self._check(leases)
                    last_ok = time.monotonic()
                except Exception as e:  # noqa: BLE001 - the database away: keep trying
                    log.warning("worker %s: lease check failed (%s: %s)", self.name,
                                e.__class__.__name__, str(e).splitlines()[0] if str(e) else "")
                    if time.monotonic() - last_ok > w.lease_s and self.held:
                        log.error("worker %s: leases not renewed for %.0f s; stopping its "
                                  "units (others take them)", self.name, w.lease_s)
                        await asyncio.gather(*(self._drop(u) for u in list(self.held)))
                try:
                    await asyncio.wait_for(self._stop.wait(), w.check_every_s)
                except asyncio.TimeoutError:
                    pass
        finally:
            for unit in list(self.held):
                await self._release(leases, unit)
            try:
                await asyncio.to_thread(leases.leave)
            except Exception:  # noqa: BLE001
                pass
            engine.dispose()
        return 1 if self.failed else 0

    async def _check(self, leases: Leases) -> None:
        for unit, h in list(self.held.items()):     # a unit service that ended by itself
            if h.task.done():
                exc = None if h.task.cancelled() else h.task.exception()
                why = h.service.fatal or (f"{exc.__class__.__name__}: {exc}" if exc else
                                          "it ended")
                log.warning("worker %s: unit %s stopped (%s); giving its lease up",
                            self.name, unit, why)
                self.held.pop(unit)
                self.history.append((unit, "lost", time.monotonic()))
                await asyncio.to_thread(leases.release, unit, h.token)
        members = await asyncio.to_thread(leases.heartbeat)
        lag = {u: h.service.last_commit for u, h in self.held.items()
               if h.service.last_commit is not None}
        kept = await asyncio.to_thread(leases.renew, {u: h.token for u, h in self.held.items()},
                                       lag)
        for unit in [u for u in self.held if u not in kept]:
            log.error("worker %s: the lease of unit %s was taken by another worker; stopping "
                      "it here", self.name, unit)
            await self._drop(unit)
        self._checks += 1
        if self._checks == 1:
            return      # first heartbeat only: workers starting together see each other
        target = share(self.units, members, self.name)
        surplus = len(self.held) - target
        if surplus > 0:
            for unit in sorted(self.held, reverse=True)[:surplus]:
                log.info("worker %s: %d worker(s) now; handing unit %s over", self.name,
                         len(members), unit)
                await self._release(leases, unit)
            return
        need = -surplus
        if need == 0:
            return
        now, rows = await asyncio.to_thread(leases.table)
        taken = {r.unit for r in rows if r.expires >= now}
        free = [u for u in self.units if u not in taken and u not in self.held]
        # spread the claims of workers starting together: begin at this worker's rank
        rank = sorted(set(members) | {self.name}).index(self.name)
        free = free[rank % len(free):] + free[:rank % len(free)] if free else free
        for unit in free[:need]:
            token = await asyncio.to_thread(leases.claim, unit)
            if token is not None:
                await self._start(unit, token)

    async def _start(self, unit: str, token: int) -> None:
        ucfg = unit_config(self.cfg, unit)
        svc = UnitService(ucfg, self.make_transport(ucfg), db_url=self.db_url, token=token,
                          full_config=self.cfg, log_health=False)
        task = asyncio.create_task(svc.run(), name=f"hemostream-unit-{unit}")
        self.held[unit] = Held(token, svc, task, time.time())
        self.history.append((unit, "claimed", time.monotonic()))
        log.info("worker %s: claimed unit %s (token %d)", self.name, unit, token)

    async def _drop(self, unit: str) -> None:
        """Stop a unit's service (its lease is gone or going)."""
        h = self.held.pop(unit, None)
        if h is None:
            return
        h.service.stop()
        try:
            await h.task
        except Exception as e:  # noqa: BLE001
            log.warning("unit %s stopped with %s", unit, e.__class__.__name__)
        self.history.append((unit, "stopped", time.monotonic()))

    async def _release(self, leases: Leases, unit: str) -> None:
        """Stop a unit's service, its last batch committed and acknowledged, then free it."""
        h = self.held.get(unit)
        if h is None:
            return
        await self._drop(unit)
        try:
            await asyncio.to_thread(leases.release, unit, h.token)
        except Exception as e:  # noqa: BLE001 - it expires by itself then
            log.warning("unit %s: lease not released (%s); it expires in %.0f s", unit,
                        e.__class__.__name__, self.cfg.workers.lease_s)
        self.history.append((unit, "released", time.monotonic()))
