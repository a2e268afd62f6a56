"""Storage: SQLAlchemy 2.0 typed ORM models, engine set-up and a batched writer thread.

The same models serve SQLite (the embedded default, WAL mode) and PostgreSQL (a URL away).
Times are stored as epoch seconds UTC (double precision): portable, compact and fast to
insert; the query command prints them as RFC 3339. Rows arrive from the core as plain dicts
and are written with Core ``insert`` in batches on a writer thread, so a slow disk never
stalls ingest and the hot path creates no ORM objects.
"""

from __future__ import annotations

import hashlib
import json
import logging
import queue
import threading
from operator import itemgetter
import time as _time
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable

from sqlalchemy import (BigInteger, Boolean, Float, ForeignKey, Index, Integer, LargeBinary,
                        String, Text, UniqueConstraint, create_engine, event, func, insert,
                        select)
from sqlalchemy import exc as sa_exc
from sqlalchemy.engine import Engine
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

from .core.processor import OBSERVATION_COLUMNS, obs_identity, raw_digest
from .core.redact import redact

log = logging.getLogger(__name__)


class Base(DeclarativeBase):
    pass


#: 64-bit ids on PostgreSQL; on SQLite only INTEGER PRIMARY KEY is the auto-incrementing rowid
BigId = BigInteger().with_variant(Integer, "sqlite")


class Bed(Base):
    __tablename__ = "beds"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    unit: Mapped[str] = mapped_column(String(32))
    bed: Mapped[str] = mapped_column(String(32))
    __table_args__ = (UniqueConstraint("unit", "bed"),)


class Message(Base):
    """Every accepted message (identity for duplicate detection, audit of arrival)."""

    __tablename__ = "messages"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=False)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    rx: Mapped[float] = mapped_column(Float(53))
    topic: Mapped[str] = mapped_column(String(512))
    kind: Mapped[str] = mapped_column(String(8))
    device: Mapped[str | None] = mapped_column(String(64))
    seq: Mapped[int | None] = mapped_column(BigInteger)
    time: Mapped[float] = mapped_column(Float(53))
    late: Mapped[bool] = mapped_column(Boolean)
    n_obs: Mapped[int] = mapped_column(Integer)
    #: content digest of admit/note/cmd messages (their identity for duplicate detection)
    digest: Mapped[str | None] = mapped_column(String(16))
    __table_args__ = (Index("ix_messages_device", "device", "id"),)


class Observation(Base):
    """Every received observation: canonical value and unit, and the value as received."""

    __tablename__ = "observations"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    param: Mapped[str] = mapped_column(String(16))
    time: Mapped[float] = mapped_column(Float(53))
    value: Mapped[float] = mapped_column(Float(53))
    unit: Mapped[str] = mapped_column(String(16))
    raw_value: Mapped[float] = mapped_column(Float(53))
    raw_unit: Mapped[str] = mapped_column(String(16))
    status: Mapped[str] = mapped_column(String(16))
    late: Mapped[bool] = mapped_column(Boolean)
    __table_args__ = (Index("ix_observations_bed_param_time", "bed_id", "param", "time"),)


class DerivedValue(Base):
    """A derived value with the inputs (param, measurement time) it was computed from."""

    __tablename__ = "derived"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    param: Mapped[str] = mapped_column(String(16))
    time: Mapped[float] = mapped_column(Float(53))
    value: Mapped[float] = mapped_column(Float(53))
    unit: Mapped[str] = mapped_column(String(16))
    inputs: Mapped[str] = mapped_column(Text)
    __table_args__ = (Index("ix_derived_bed_param_time", "bed_id", "param", "time"),)


class Admission(Base):
    __tablename__ = "admissions"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    height_cm: Mapped[float | None] = mapped_column(Float)
    weight_kg: Mapped[float | None] = mapped_column(Float)
    bsa_m2: Mapped[float | None] = mapped_column(Float)
    bsa_formula: Mapped[str | None] = mapped_column(String(16))
    limits: Mapped[str] = mapped_column(Text)
    discharged: Mapped[bool] = mapped_column(Boolean)


class Note(Base):
    __tablename__ = "notes"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    kind: Mapped[str] = mapped_column(String(32))
    volume_ml: Mapped[float | None] = mapped_column(Float)
    over_min: Mapped[float | None] = mapped_column(Float)
    param: Mapped[str | None] = mapped_column(String(16))
    by: Mapped[str | None] = mapped_column(String(64))
    text: Mapped[str | None] = mapped_column(Text)
    duration_s: Mapped[float | None] = mapped_column(Float)


class Command(Base):
    """Acknowledge / audio-pause commands as received, with what became of them (audit)."""

    __tablename__ = "commands"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    rx: Mapped[float] = mapped_column(Float(53))
    action: Mapped[str] = mapped_column(String(16))
    alarm: Mapped[str] = mapped_column(String(128))
    by: Mapped[str] = mapped_column(String(64))
    result: Mapped[str] = mapped_column(Text)


class Rejected(Base):
    """Input that failed a rule of the wire format: where, when, what and why."""

    __tablename__ = "rejected"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    rx: Mapped[float | None] = mapped_column(Float(53))
    topic: Mapped[str] = mapped_column(String(512))
    category: Mapped[str] = mapped_column(String(32))
    reason: Mapped[str] = mapped_column(Text)
    obs_index: Mapped[int | None] = mapped_column(Integer)
    device: Mapped[str | None] = mapped_column(String(64))
    seq: Mapped[int | None] = mapped_column(BigInteger)
    raw: Mapped[bytes] = mapped_column(LargeBinary)
    size: Mapped[int] = mapped_column(Integer)


class AlarmEvent(Base):
    """One alarm lifecycle transition (or rule information such as a fluid-challenge result)."""

    __tablename__ = "alarm_events"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    alarm_id: Mapped[str] = mapped_column(String(128))
    rule: Mapped[str] = mapped_column(String(64))
    priority: Mapped[str] = mapped_column(String(8))
    category: Mapped[str] = mapped_column(String(16))
    transition: Mapped[str] = mapped_column(String(32))
    value: Mapped[float | None] = mapped_column(Float(53))
    details: Mapped[str] = mapped_column(Text)
    by: Mapped[str | None] = mapped_column(String(64))
    __table_args__ = (Index("ix_alarm_events_bed_time", "bed_id", "time"),)


class ConfigSnapshot(Base):
    """A configuration that came into force (replay or live run start), kept with the data so
    a review reads the limits that applied rather than those of today's file.

    ``time``: from when it applies (epoch seconds UTC; the newest stored arrival when it was
    written, 0 for an empty database), ``sha256`` of ``config`` (canonical JSON: sorted keys,
    no spaces). A configuration equal to the one last in force is not written again."""

    __tablename__ = "config_snapshots"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    time: Mapped[float] = mapped_column(Float(53))
    sha256: Mapped[str] = mapped_column(String(64))
    config: Mapped[str] = mapped_column(Text)
    __table_args__ = (Index("ix_config_snapshots_time", "time"),)


TABLES = {
    "beds": Bed.__table__, "messages": Message.__table__,
    "observations": Observation.__table__, "derived": DerivedValue.__table__,
    "admissions": Admission.__table__, "notes": Note.__table__,
    "commands": Command.__table__, "rejected": Rejected.__table__,
    "alarm_events": AlarmEvent.__table__, "config_snapshots": ConfigSnapshot.__table__,
}
#: insertion order that respects foreign keys
INSERT_ORDER = ("beds", "messages", "observations", "derived", "admissions", "notes",
                "commands", "rejected", "alarm_events", "config_snapshots")


class StoreError(RuntimeError):
    pass


def open_engine(url: str, *, create: bool = True) -> Engine:
    """Create an engine for ``url`` (SQLite in WAL mode) and make sure the tables exist."""
    kwargs: dict[str, Any] = {}
    if url.startswith("sqlite"):
        kwargs["connect_args"] = {"check_same_thread": False}
    try:
        engine = create_engine(url, **kwargs)
    except Exception as e:  # bad URL, missing driver
        raise StoreError(redact(f"database URL {url!r}: {e}")) from None
    if engine.dialect.name == "sqlite":
        @event.listens_for(engine, "connect")
        def _pragmas(dbapi_conn, _rec):  # pragma: no cover - exercised via every test
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            # foreign keys stay declared (PostgreSQL enforces them); SQLite checking each one
            # on insert cost a quarter of the write time, and the processor assigns every id
            # that rows refer to before they are written, in one transaction per batch
            cur.execute("PRAGMA foreign_keys=OFF")
            cur.close()
    try:
        if create:
            Base.metadata.create_all(engine)
        else:
            with engine.connect():
                pass
    except Exception as e:
        raise StoreError(redact(f"cannot open database {url!r}: {e.__class__.__name__}: "
                                f"{str(e).splitlines()[0]}")) from None
    return engine


@dataclass
class Resume:
    """What a processor needs from an existing database to carry on where it stopped."""

    next_ids: dict[str, int]
    beds: list[tuple[int, str, str]]
    messages: list[tuple[str, Any]]
    #: (topic, digest) of recent rejects kept whole: a retained one is not stored again
    retained_rejects: list[tuple[str, str]] = field(default_factory=list)


def load_resume(engine: Engine, recent: int = 200_000) -> Resume:
    """Next ids, known beds, and the identities of the most recent messages (for dedup)."""
    m = Message.__table__
    with engine.connect() as conn:
        max_id = conn.execute(select(func.max(m.c.id))).scalar() or 0
        beds = [(r.id, r.unit, r.bed) for r in conn.execute(select(Bed.__table__))]
        rows = conn.execute(
            select(m.c.kind, m.c.topic, m.c.device, m.c.seq, m.c.time, m.c.digest)
            .where(m.c.id > max_id - recent).order_by(m.c.id)).all()
        rj = Rejected.__table__
        rejects = conn.execute(
            select(rj.c.topic, rj.c.raw).where(rj.c.size == func.length(rj.c.raw))
            .order_by(rj.c.id.desc()).limit(10_000)).all()
    known = [(r.device, obs_identity(r.seq, r.time)) if r.kind == "obs"
             else (r.topic, (r.kind, r.time, r.digest)) for r in rows]
    return Resume(next_ids={"messages": max_id + 1,
                            "beds": max((b[0] for b in beds), default=0) + 1},
                  beds=beds, messages=known,
                  retained_rejects=[(r.topic, raw_digest(r.raw)) for r in rejects])


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


def write_rows(engine: Engine, rows: dict[str, list[dict]]) -> None:
    """Insert rows of several tables in one transaction (foreign-key order).

    The hot path: each table's batch goes to the driver's ``executemany`` as one statement
    compiled by SQLAlchemy for the dialect (no per-row ORM or type-processing work; the
    values are already plain floats, ints, strings, booleans and bytes).
    """
    positional = engine.dialect.positional
    with engine.begin() as conn:
        for name in INSERT_ORDER:
            batch = rows.get(name)
            if not batch:
                continue
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
                continue
            sql, order = _insert_sql(engine, name, tuple(sorted(batch[0])))
            if positional:
                get = itemgetter(*order)
                params = [(get(r),) for r in batch] if len(order) == 1 else list(map(get, batch))
            else:
                params = batch
            conn.exec_driver_sql(sql, params)


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

    def __init__(self, engine: Engine, max_batches: int = 64) -> None:
        self.engine = engine
        self.q: queue.Queue = queue.Queue(max_batches)
        self.error: BaseException | None = None
        self.batches = 0
        self.rows = 0
        self.refused = 0                        # messages stored as storage_refused rejects
        self.retries = 0
        self.trouble: str | None = None         # why writes are waiting, while they are
        self.trouble_since: float | None = None
        self.last_latency_s = 0.0
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
                write_rows(self.engine, rows)
            except Exception as e:  # noqa: BLE001
                if _content_error(e) or self._closing:
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
        if self.error is not None:
            raise StoreError(f"database writes failed: {_first_line(self.error)}") from None


def rows_of(outputs: Any) -> dict[str, list[dict]]:
    """The table rows of a :class:`hemostream.core.processor.Outputs`."""
    return {name: getattr(outputs, name) for name in INSERT_ORDER
            if getattr(outputs, name, None)}


# --------------------------------------------------------------------------- configurations


def canonical_config(cfg: Any) -> tuple[str, str]:
    """(canonical JSON, its sha256) of a configuration model (or plain dict).

    >>> canonical_config({"b": 1, "a": [1.5]})[0]
    '{"a":[1.5],"b":1}'
    """
    data = cfg.model_dump(mode="json") if hasattr(cfg, "model_dump") else cfg
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return text, hashlib.sha256(text.encode()).hexdigest()


def record_config(engine: Engine, cfg: Any, time: float | None = None) -> bool:
    """Store ``cfg`` as the configuration in force from ``time`` (default: the newest stored
    arrival, so it applies to what comes next; 0 for an empty database). Nothing is written
    when it equals the configuration last in force. Returns whether a row was written."""
    text, digest = canonical_config(cfg)
    t = ConfigSnapshot.__table__
    with engine.connect() as conn:
        last = conn.execute(select(t.c.sha256).order_by(t.c.time.desc(), t.c.id.desc())
                            .limit(1)).scalar()
        if last == digest:
            return False
        if time is None:
            time = conn.execute(select(func.max(Message.__table__.c.rx))).scalar() or 0.0
    write_rows(engine, {"config_snapshots": [
        {"time": float(time), "sha256": digest, "config": text}]})
    return True


def config_snapshots(engine: Engine, since: float | None = None, limit: int | None = None
                     ) -> list[dict[str, Any]]:
    """Stored configurations, oldest first: ``time`` (epoch s), ``sha256``, ``config`` (the
    parsed JSON). An older database without the table has none."""
    from sqlalchemy import inspect

    if not inspect(engine).has_table("config_snapshots"):
        return []
    t = ConfigSnapshot.__table__
    stmt = select(t).order_by(t.c.time, t.c.id)
    if since is not None:
        stmt = stmt.where(t.c.time >= since)
    if limit:
        stmt = stmt.limit(limit)
    with engine.connect() as conn:
        return [{"time": r.time, "sha256": r.sha256, "config": json.loads(r.config)}
                for r in conn.execute(stmt)]


def config_in_force(engine: Engine, at: float) -> dict[str, Any] | None:
    """The configuration (parsed JSON) in force at ``at``: the newest snapshot from at or
    before ``at``, else the first one; None when nothing was stored."""
    snaps = config_snapshots(engine)
    before = [s for s in snaps if s["time"] <= at]
    pick = before[-1] if before else (snaps[0] if snaps else None)
    return pick["config"] if pick else None


def iter_rows(engine: Engine, stmt) -> Iterable[Any]:
    with engine.connect() as conn:
        yield from conn.execute(stmt)
