"""The batched writer: rows of several tables in one transaction, on a thread.

Observations and derived values become per-bed chunk segments (:mod:`.chunks`); every other
table gets Core ``executemany`` batches compiled once per dialect.
"""

from __future__ import annotations

import json
import logging
import queue
import threading
import time as _time
import weakref
from operator import itemgetter
from typing import Any, Callable

from sqlalchemy import insert
from sqlalchemy import exc as sa_exc
from sqlalchemy.engine import Engine

from ..core.processor import OBSERVATION_COLUMNS
from .chunks import Chunker
from .space import give_back_free_pages
from .schema import CHUNKED, INSERT_ORDER, TABLES

log = logging.getLogger("hemostream.store")


class StoreError(RuntimeError):
    pass


#: tables whose rows the core hands over as tuples, and their column order
TUPLE_COLUMNS = {"observations": OBSERVATION_COLUMNS}

_SQL_CACHE: dict[tuple[str, str, tuple[str, ...]], tuple[str, tuple[str, ...]]] = {}


def _insert_sql(engine: Engine, name: str, cols: tuple[str, ...]) -> tuple[str, tuple[str, ...]]:
    """The dialect's INSERT for these columns, and the order its positional parameters take."""
    key = (engine.dialect.name, name, cols)
    hit = _SQL_CACHE.get(key)
    if hit is None:
        compiled = insert(TABLES[name]).compile(dialect=engine.dialect,
                                                column_keys=list(cols))
        order = tuple(compiled.positiontup or cols)
        hit = _SQL_CACHE[key] = (str(compiled), order)
    return hit


_CHUNKERS: "weakref.WeakKeyDictionary[Engine, Chunker]" = weakref.WeakKeyDictionary()


def chunker(engine: Engine) -> Chunker:
    """The engine's :class:`Chunker` (seal thresholds, unsealed segments per bed)."""
    c = _CHUNKERS.get(engine)
    if c is None:
        c = _CHUNKERS[engine] = Chunker()
    return c


def configure_chunks(engine: Engine, messages: int, segments: int,
                     stage_messages: int | None = None, stage_s: float | None = None,
                     stage_groups: int | None = None) -> None:
    c = chunker(engine)
    c.messages, c.segments = messages, segments
    if stage_groups is not None:
        c.groups = stage_groups
    if stage_messages is not None:
        c.stage_messages = stage_messages
    if stage_s is not None:
        c.stage_s = stage_s


class Fenced(RuntimeError):
    """The writer lost its right to write (its unit's lease moved to another worker): raised
    by a write guard inside the transaction, which is then rolled back; never retried."""


def write_rows(engine: Engine, rows: dict[str, list[Any]],
               guard: Callable[[Any], None] | None = None,
               chunks: Chunker | None = None) -> None:
    """Insert rows of several tables in one transaction (foreign-key order).

    The hot path: each table's batch goes to the driver as one statement - ``executemany``
    compiled by SQLAlchemy for the dialect, or on PostgreSQL one ``COPY ... FROM STDIN``
    (:mod:`.pg`) - with no per-row ORM or type-processing work (the values are already
    plain floats, ints, strings, booleans and bytes). ``chunks``: the writer's own
    :class:`Chunker` (default: the engine's).
    """
    if engine.dialect.name == "postgresql":
        _partitions_first(engine, rows)
        put = _copy_batch
    else:
        put = _executemany_batch
    with engine.begin() as conn:
        if guard is not None:       # e.g. a lease check (raises Fenced): same transaction
            guard(conn)
        for name in INSERT_ORDER:
            if name in CHUNKED:
                if name == "observations" and (rows.get("observations") or rows.get("derived")):
                    (chunks or chunker(engine)).write(conn, rows.get("observations") or [],
                                                      rows.get("derived") or [])
                continue
            batch = rows.get(name)
            if batch:
                put(engine, conn, name, batch)


def _executemany_batch(engine: Engine, conn: Any, name: str, batch: list[Any]) -> None:
    positional = engine.dialect.positional
    if isinstance(batch[0], tuple):        # rows given in a fixed column order
        cols = TUPLE_COLUMNS[name]
        sql, order = _insert_sql(engine, name, cols)
        if positional and order == cols:
            params = batch
        else:
            params = [dict(zip(cols, r)) for r in batch]
            if positional:
                get = itemgetter(*order)
                params = list(map(get, params))
        conn.exec_driver_sql(sql, params)
        return
    sql, order = _insert_sql(engine, name, tuple(sorted(batch[0])))
    if positional:
        get = itemgetter(*order)
        params = [(get(r),) for r in batch] if len(order) == 1 else list(map(get, batch))
    else:
        params = list(batch)
    conn.exec_driver_sql(sql, params)


def _copy_batch(engine: Engine, conn: Any, name: str, batch: list[Any]) -> None:
    from .pg import copy_rows

    if isinstance(batch[0], tuple):
        copy_rows(conn, name, TUPLE_COLUMNS[name], batch)
        return
    cols = tuple(batch[0])
    copy_rows(conn, name, cols, map(itemgetter(*cols), batch) if len(cols) > 1
              else ((r[cols[0]],) for r in batch))


def _partitions_first(engine: Engine, rows: dict[str, list[Any]]) -> None:
    """Make the day partitions this batch's chunks need (and the next days') in a short
    transaction of their own, before the write transaction: creating a partition locks the
    partitioned table, and a writer that did it inside its write transaction (holding row
    locks on its lease and the parent) could deadlock with another unit's writer doing the
    same, and hold its lease's row long enough for the lease to run out."""
    from .pg import known

    ts: list[float] = []
    for name in ("observations", "derived"):
        batch = rows.get(name) or []
        if not batch:
            continue
        if isinstance(batch[0], tuple):
            k = TUPLE_COLUMNS[name].index("time")
            vals = [r[k] for r in batch]
        else:
            vals = [r["time"] for r in batch]
        vals = [float(v) for v in vals if v is not None]
        if vals:
            ts += [min(vals), max(vals)]
    if ts:
        with engine.begin() as conn:
            known(engine).ensure(conn, ts)


#: how the writer waits out a database that is busy or away: first pause, longest pause
RETRY_FIRST_S, RETRY_MAX_S = 0.1, 5.0


def _content_error(e: BaseException) -> bool:
    """True when the database refused a row for what it holds (a value out of the column's
    range, text it cannot store): retrying cannot help, the message becomes a reject.
    False for a database that is busy, locked, full or unreachable: retry, never drop."""
    if isinstance(e, (sa_exc.DataError, sa_exc.IntegrityError)):
        return True
    if isinstance(e, sa_exc.DBAPIError):
        return False             # OperationalError, InterfaceError, ...: the database itself
    if isinstance(e, sa_exc.StatementError):
        e = e.orig or e          # a value the driver could not even bind
    return isinstance(e, (OverflowError, ValueError, TypeError, UnicodeError))


def _first_line(e: BaseException) -> str:
    """An error's class and first line, without the SQL parameters (they may hold content)."""
    orig = getattr(e, "orig", None) or e
    text = str(orig).splitlines()[0] if str(orig) else ""
    return f"{orig.__class__.__name__}: {text}"[:300].replace("\x00", "")


def _by_message(rows: dict[str, list]) -> tuple[dict[int, dict[str, list]], dict[str, list]]:
    """Split a batch into each message's rows, and the rows that belong to no message."""
    per: dict[int, dict[str, list]] = {}
    rest: dict[str, list] = {}
    for name, batch in rows.items():
        for r in batch:
            if name == "messages":
                mid = r["id"]
            elif isinstance(r, tuple):
                mid = r[0]                      # OBSERVATION_COLUMNS starts with message_id
            elif isinstance(r, dict) and "message_id" in r:
                mid = r["message_id"]
            else:
                rest.setdefault(name, []).append(r)
                continue
            per.setdefault(mid, {}).setdefault(name, []).append(r)
    return per, rest


def _refused_reject(msg_rows: dict[str, list], why: str) -> dict:
    """The reject that stands for a message the database refused (kept for audit)."""
    m = (msg_rows.get("messages") or [{}])[0]
    seq = m.get("seq")
    raw = json.dumps({k: [list(r) if isinstance(r, tuple) else r for r in v]
                      for k, v in msg_rows.items()}, default=repr).encode()
    return {"rx": m.get("rx"), "topic": str(m.get("topic", "?"))[:512].replace("\x00", ""),
            "category": "storage_refused",
            "reason": f"the database refused this message's content ({why})",
            "obs_index": None, "device": None,
            "seq": seq if isinstance(seq, int) and -2 ** 63 <= seq < 2 ** 63 else None,
            "raw": raw[:65536], "size": len(raw)}


class Writer:
    """A thread that writes batches of rows; ``submit`` blocks when the queue is full.

    ``on_done`` callbacks run on the writer thread after their batch is committed, which is
    what lets the live path acknowledge a message to the broker only once it is durable.

    No single message can stop it. A batch the database refuses for its content is written
    again message by message; a message that is still refused is stored as a reject
    (category ``storage_refused``) in its place. A database that is locked, busy, full or
    away is waited out with back-off (``trouble`` says so meanwhile); nothing is dropped and
    nothing is acknowledged until it is written.
    """

    def __init__(self, engine: Engine, max_batches: int = 64, store_cfg: Any = None) -> None:
        self.engine = engine
        if store_cfg is not None:
            configure_chunks(engine, store_cfg.chunk_messages, store_cfg.chunk_segments,
                             store_cfg.stage_messages, store_cfg.stage_s,
                             store_cfg.stage_groups)
        # its own staging and sealing state: several writers of one process (the workers'
        # units) share an engine, each on its own thread
        d = chunker(engine)
        self.chunks = Chunker(d.messages, d.segments, d.stage_messages, d.stage_s, d.groups)
        self.chunks.seq_source = d
        self.q: queue.Queue = queue.Queue(max_batches)
        self.error: BaseException | None = None
        self.batches = 0
        self.rows = 0
        self.refused = 0                        # messages stored as storage_refused rejects
        self.retries = 0
        self.trouble: str | None = None         # why writes are waiting, while they are
        self.trouble_since: float | None = None
        self.last_latency_s = 0.0
        #: called with the connection first in every write transaction (raises Fenced)
        self.guard: Callable[[Any], None] | None = None
        self._closing = False
        self._t = threading.Thread(target=self._run, name="hemostream-writer", daemon=True)
        self._t.start()

    def submit(self, rows: dict[str, list[dict]],
               on_done: Callable[[], None] | None = None) -> None:
        if self.error is not None:
            raise StoreError(f"database writes failed: {_first_line(self.error)}") from None
        self.q.put((rows, on_done))

    def _run(self) -> None:
        while True:
            item = self.q.get()
            if item is None:
                self.q.task_done()
                return
            rows, on_done = item
            try:
                if self.error is None:
                    t0 = _time.perf_counter()
                    self.write(rows)
                    self.last_latency_s = _time.perf_counter() - t0
                    self.batches += 1
                    self.rows += sum(len(v) for v in rows.values())
                    if on_done is not None:
                        on_done()
            except BaseException as e:  # keep the thread alive to report
                log.debug("database write failed: %s", e.__class__.__name__)
                self.error = e
            finally:
                self.q.task_done()

    def write(self, rows: dict[str, list]) -> None:
        """Write one batch, whatever it takes (see the class docstring)."""
        try:
            self._patiently(rows)
        except Exception as e:  # noqa: BLE001 - sorted below
            if not _content_error(e):
                raise
            self._isolate(rows, _first_line(e))

    def _patiently(self, rows: dict[str, list]) -> None:
        """``write_rows``, retried with back-off while the database is busy or away."""
        pause = RETRY_FIRST_S
        while True:
            try:
                write_rows(self.engine, rows, self.guard, self.chunks)
            except Exception as e:  # noqa: BLE001
                if isinstance(e, Fenced) or _content_error(e) or self._closing:
                    raise
                if self.trouble is None:
                    self.trouble_since = _time.time()
                    log.warning("database writes waiting (will retry, nothing is dropped): %s",
                                _first_line(e))
                self.trouble = _first_line(e)
                self.retries += 1
                _time.sleep(pause)
                pause = min(pause * 2, RETRY_MAX_S)
                continue
            if self.trouble is not None:
                log.warning("database writes resumed after %.1f s",
                            _time.time() - (self.trouble_since or _time.time()))
                self.trouble = self.trouble_since = None
            return

    def _isolate(self, rows: dict[str, list], why: str) -> None:
        per, rest = _by_message(rows)
        for r in rest.pop("beds", ()):          # the rows every message refers to come first
            self._one_row("beds", r)
        for msg_rows in per.values():
            try:
                self._patiently(msg_rows)
            except Exception as e:  # noqa: BLE001
                if not _content_error(e):
                    raise
                self.refused += 1
                log.warning("the database refused a message's content; stored as a reject "
                            "(%s)", _first_line(e))
                self._one_row("rejected", _refused_reject(msg_rows, _first_line(e)))
        for name in INSERT_ORDER:
            for r in rest.get(name, ()):
                self._one_row(name, r)

    def _one_row(self, name: str, row: Any) -> None:
        try:
            self._patiently({name: [row]})
        except Exception as e:  # noqa: BLE001
            if not _content_error(e):
                raise
            if name == "rejected":                  # a reject that cannot be stored as is
                slim = dict(row, device=None, seq=None, raw=b"", reason=str(
                    row.get("reason", ""))[:2000].replace("\x00", "\\0"),
                            topic=str(row.get("topic", ""))[:512].replace("\x00", ""))
                try:
                    self._patiently({name: [slim]})
                    return
                except Exception as e2:  # noqa: BLE001
                    if not _content_error(e2):
                        raise
            log.error("a %s row could not be stored and was dropped (%s)", name,
                      _first_line(e))

    def give_up(self) -> None:
        """Stop waiting for an unavailable database (shutdown): pending batches fail."""
        self._closing = True

    def flush(self) -> None:
        """Wait until everything submitted so far is written."""
        self.q.join()
        if self.error is not None:
            raise StoreError(f"database writes failed: {_first_line(self.error)}") from None

    def close(self) -> None:
        self.q.put(None)
        self._t.join()
        if self.error is None and not self._closing:
            try:       # fewer, better-compressed rows for each bed's open segments
                with self.engine.begin() as conn:
                    self.chunks.compact_all(conn)
                give_back_free_pages(self.engine)
            except Exception as e:  # noqa: BLE001 - an optimisation only
                log.warning("could not compact the open chunks: %s", _first_line(e))
        if self.error is not None:
            raise StoreError(f"database writes failed: {_first_line(self.error)}") from None


def rows_of(outputs: Any) -> dict[str, list[dict]]:
    """The table rows of a :class:`hemostream.core.processor.Outputs`."""
    return {name: getattr(outputs, name) for name in INSERT_ORDER
            if getattr(outputs, name, None)}


