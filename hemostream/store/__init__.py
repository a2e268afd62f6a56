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
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Iterable

from sqlalchemy import create_engine, event, func, select
from sqlalchemy.engine import Engine

from ..core.redact import redact
from . import versions
from .chunks import Chunker  # noqa: F401  (re-exported)
from .reading import iter_derived, iter_observations, sealed_messages  # noqa: F401
from .schema import (CHUNKED, INSERT_ORDER, TABLES, AlarmEvent, Admission, Base,  # noqa: F401
                     Bed, Command, ConfigSnapshot, Message, MinuteStat, Note, ObsChunk,
                     ObsStaging, Rejected)

log = logging.getLogger(__name__)

# The writer and the core's processor (and with it the configuration and rules models) are
# imported when first used: reading (``hemostream query``, the review) needs neither, and
# importing them cost a tenth of a second of every query. ``from hemostream.store import
# Writer`` works as before (module ``__getattr__``).
_LAZY = {**dict.fromkeys(("StoreError", "RETRY_FIRST_S", "RETRY_MAX_S", "TUPLE_COLUMNS",
                          "Writer", "chunker", "configure_chunks", "rows_of", "write_rows"),
                         "writer"),
         **dict.fromkeys(("OBSERVATION_COLUMNS", "obs_identity", "raw_digest"), "processor")}

if TYPE_CHECKING:
    from ..core.processor import OBSERVATION_COLUMNS, obs_identity, raw_digest  # noqa: F401
    from .writer import (RETRY_FIRST_S, RETRY_MAX_S, TUPLE_COLUMNS, StoreError,  # noqa: F401
                         Writer, chunker, configure_chunks, rows_of, write_rows)


def __getattr__(name: str) -> Any:
    where = _LAZY.get(name)
    if where is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    if where == "writer":
        from . import writer as mod
    else:
        from ..core import processor as mod
    value = getattr(mod, name)
    globals()[name] = value
    return value


def _store_error(text: str) -> Exception:
    from .writer import StoreError
    return StoreError(text)


def open_engine(url: str, *, create: bool = True, check: bool = True) -> Engine:
    """Create an engine for ``url`` (SQLite in WAL mode); an empty database is created at
    the newest schema revision (``create``), any other must be at it (``check``: else a
    :class:`StoreError` that names ``hemostream db upgrade``)."""
    kwargs: dict[str, Any] = {}
    if url.startswith("sqlite"):
        kwargs["connect_args"] = {"check_same_thread": False}
    try:
        engine = create_engine(url, **kwargs)
    except Exception as e:  # bad URL, missing driver
        raise _store_error(redact(f"database URL {url!r}: {e}")) from None
    if engine.dialect.name == "sqlite":
        @event.listens_for(engine, "connect")
        def _pragmas(dbapi_conn, _rec):  # pragma: no cover - exercised via every test
            cur = dbapi_conn.cursor()
            # before WAL: a new, empty file takes it (an existing one at its next VACUUM);
            # the writer gives freed pages back with PRAGMA incremental_vacuum on close
            cur.execute("PRAGMA auto_vacuum=INCREMENTAL")
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            # foreign keys stay declared (PostgreSQL enforces them); SQLite checking each one
            # on insert cost a quarter of the write time, and the processor assigns every id
            # that rows refer to before they are written, in one transaction per batch
            cur.execute("PRAGMA foreign_keys=OFF")
            cur.close()
    try:
        with engine.connect() as conn:
            rev = versions.current(conn)
        if rev is None and create:
            versions.create_at_head(engine, Base.metadata)
        elif check and rev is not None:
            versions.check(engine, url)
    except versions.SchemaError as e:
        engine.dispose()
        raise _store_error(str(e)) from None
    except Exception as e:
        raise _store_error(redact(f"cannot open database {url!r}: {e.__class__.__name__}: "
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


#: rejects read back on start to know a retained one again: only small ones (a retained
#: message is a state, not a stream), so a start reads a few MB at most, never every raw byte
RETAINED_REJECT_BYTES = 4096


def load_resume(engine: Engine, recent: int = 200_000) -> Resume:
    """Next ids, known beds, and the identities of the most recent messages (for dedup)."""
    from ..core.processor import obs_identity, raw_digest

    m = TABLES["messages"]
    ch = TABLES["obs_chunks"]
    with engine.connect() as conn:
        max_id = max(conn.execute(select(func.max(m.c.id))).scalar() or 0,
                     conn.execute(select(func.max(ch.c.mid_max))).scalar() or 0)
        beds = [(r.id, r.unit, r.bed) for r in conn.execute(select(TABLES["beds"]))]
        rows = [r._mapping for r in conn.execute(
            select(m.c.id, m.c.kind, m.c.topic, m.c.device, m.c.seq, m.c.time, m.c.digest)
            .where(m.c.id > max_id - recent))]
        rows += list(sealed_messages(conn, max_id - recent + 1))
        rows.sort(key=lambda r: r["id"])
        rj = TABLES["rejected"]
        rejects = conn.execute(
            select(rj.c.topic, rj.c.raw)
            .where(rj.c.size == func.length(rj.c.raw), rj.c.size <= RETAINED_REJECT_BYTES)
            .order_by(rj.c.id.desc()).limit(2_000)).all()
    known = [(r["device"], obs_identity(r["seq"], r["time"])) if r["kind"] == "obs"
             else (r["topic"], (r["kind"], r["time"], r["digest"])) for r in rows]
    return Resume(next_ids={"messages": max_id + 1,
                            "beds": max((b[0] for b in beds), default=0) + 1},
                  beds=beds, messages=known,
                  retained_rejects=[(r.topic, raw_digest(r.raw)) for r in rejects])


def iter_messages(engine: Engine, kind: str | None = None) -> Iterable[dict[str, Any]]:
    """Every stored message as a ``messages`` row (dict), those inside sealed chunks too;
    by id."""
    m = TABLES["messages"]
    with engine.connect() as conn:
        stmt = select(m)
        if kind:
            stmt = stmt.where(m.c.kind == kind)
        rows = [dict(r._mapping) for r in conn.execute(stmt)]
        if kind in (None, "obs"):
            rows += list(sealed_messages(conn))
    rows.sort(key=lambda r: r["id"])
    return rows


def message_count(engine: Engine, kind: str | None = None) -> int:
    """How many messages are stored (the table's rows and those moved into sealed chunks)."""
    m, ch = TABLES["messages"], TABLES["obs_chunks"]
    with engine.connect() as conn:
        stmt = select(func.count()).select_from(m)
        if kind:
            stmt = stmt.where(m.c.kind == kind)
        n = conn.execute(stmt).scalar() or 0
        if kind in (None, "obs"):
            n += conn.execute(select(func.coalesce(func.sum(ch.c.m_count), 0))).scalar() or 0
    return int(n)


def newest_arrival(conn) -> float | None:
    m, ch = TABLES["messages"], TABLES["obs_chunks"]
    vals = [conn.execute(select(func.max(m.c.rx))).scalar(),
            conn.execute(select(func.max(ch.c.rx_max))).scalar()]
    vals = [v for v in vals if v is not None]
    return max(vals) if vals else None




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
    from .writer import write_rows

    text, digest = canonical_config(cfg)
    t = TABLES["config_snapshots"]
    with engine.connect() as conn:
        last = conn.execute(select(t.c.sha256).order_by(t.c.time.desc(), t.c.id.desc())
                            .limit(1)).scalar()
        if last == digest:
            return False
        if time is None:
            time = newest_arrival(conn) or 0.0
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
    t = TABLES["config_snapshots"]
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


# --------------------------------------------------------------------------- flat views

def _engine_of(db: Any) -> tuple[Engine, bool]:
    if isinstance(db, Engine):
        return db, False
    s = str(db)
    return create_engine(s if "://" in s else f"sqlite:///{s}"), True


def observation_rows(db: Any) -> list[dict[str, Any]]:
    """Every stored observation as the one-row-per-observation table had it (``message_id``,
    ``bed_id``, ``param``, ``time``, ``value``, ``unit``, ``raw_value``, ``raw_unit``,
    ``status``, ``late``) and its ``quality``, by time then arrival. ``db``: an engine, a
    URL or a SQLite path."""
    engine, own = _engine_of(db)
    try:
        with engine.connect() as conn:
            return [{"message_id": mid, "bed_id": b, "param": p, "time": t, "value": v,
                     "unit": u, "raw_value": rv, "raw_unit": ru, "status": st, "late": late,
                     "quality": q}
                    for t, mid, b, p, v, u, st, rv, ru, late, q in iter_observations(conn)]
    finally:
        if own:
            engine.dispose()


def derived_rows(db: Any) -> list[dict[str, Any]]:
    """Every stored derived value (``bed_id``, ``param``, ``time``, ``value``, ``unit``,
    ``inputs`` JSON text, ``quality``), by time then storage order."""
    engine, own = _engine_of(db)
    try:
        with engine.connect() as conn:
            return [{"bed_id": b, "param": p, "time": t, "value": v, "unit": u, "inputs": i,
                     "quality": q}
                    for t, _s, b, p, v, u, i, q in iter_derived(conn)]
    finally:
        if own:
            engine.dispose()
