"""PostgreSQL at scale: ``obs_chunks`` partitioned by day, and COPY for the bulk writes.

- ``obs_chunks`` is a native declaratively partitioned table, ``PARTITION BY RANGE
  (t_min)``, one partition per UTC day (``obs_chunks_dYYYYMMDD``, bounds in epoch seconds).
  The writer creates the partition of every day it is about to write, and the next day's
  ahead of time, so the turn of a day does not wait for DDL. The primary key is
  ``(id, t_min)`` (a partitioned table's unique keys include the partition key); ids still
  come from the one sequence.
- Pruning drops a whole partition once every chunk in it is older than the cutoff
  (:func:`droppable`), instead of deleting rows (no dead tuples, no vacuum); chunks of a
  partition that also holds younger ones are deleted row by row as on SQLite.
- Bulk rows (``messages``, the other tables' batches, the chunk rows) go through psycopg's
  ``COPY ... FROM STDIN`` on the transaction's own connection (:func:`copy_rows`); its
  errors are raised as SQLAlchemy's, so the writer sorts them as before (a row refused for
  its content, or a database that is away).

:func:`partition` turns an ordinary ``obs_chunks`` into the partitioned one, rows kept
(migration ``0005_pg_partitions``, and a new database at creation).
"""

from __future__ import annotations

import datetime as _dt
import weakref
from typing import Any, Iterable, Sequence

from sqlalchemy import exc as sa_exc
from sqlalchemy.engine import Connection, Engine

DAY = 86400
PARENT = "obs_chunks"
_EPOCH = _dt.date(1970, 1, 1)
#: an advisory-lock key: two writers creating the same day's partition take turns
_LOCK = 0x68730001


def day_of(t: float) -> int:
    """The UTC day number (days since 1970-01-01) of epoch seconds ``t``.

    >>> day_of(0.0), day_of(86399.9), day_of(86400.0), day_of(-0.5)
    (0, 0, 1, -1)
    """
    return int(t // DAY)


def name_of(day: int) -> str:
    """The partition of a UTC day.

    >>> name_of(0)
    'obs_chunks_d19700101'
    >>> import datetime as dt       # the calendar, from the standard library
    >>> name_of((dt.date(2026, 12, 4) - dt.date(1970, 1, 1)).days)
    'obs_chunks_d20261204'
    """
    d = _EPOCH + _dt.timedelta(days=day)
    return f"{PARENT}_d{d.year:04d}{d.month:02d}{d.day:02d}"


def is_partitioned(conn: Connection) -> bool:
    return bool(conn.exec_driver_sql(
        "SELECT count(*) FROM pg_partitioned_table p JOIN pg_class c ON c.oid = p.partrelid "
        "WHERE c.oid = to_regclass(%(n)s)", {"n": PARENT}).scalar())


def partitions(conn: Connection) -> dict[int, str]:
    """Existing day partitions of ``obs_chunks``: day number -> table name."""
    rows = conn.exec_driver_sql(
        "SELECT c.relname, pg_get_expr(c.relpartbound, c.oid) FROM pg_inherits i "
        "JOIN pg_class c ON c.oid = i.inhrelid WHERE i.inhparent = to_regclass(%(n)s)",
        {"n": PARENT}).all()
    out: dict[int, str] = {}
    for name, bound in rows:
        # "FOR VALUES FROM ('1764806400') TO ('1764892800')"
        lo = bound.split("(", 1)[1].split(")", 1)[0].strip("'")
        out[day_of(float(lo))] = name
    return out


def create_days(conn: Connection, days: Iterable[int], known: set[int] | None = None) -> int:
    """Create the partitions of these days that do not exist yet; how many were created."""
    want = sorted(set(days) - (known or set()))
    if not want:
        return 0
    conn.exec_driver_sql("SELECT pg_advisory_xact_lock(%(k)s)", {"k": _LOCK})
    have = partitions(conn)
    made = 0
    for d in want:
        if d not in have:
            conn.exec_driver_sql(
                f'CREATE TABLE "{name_of(d)}" PARTITION OF {PARENT} '
                f"FOR VALUES FROM ({d * DAY}) TO ({(d + 1) * DAY})")
            made += 1
    if known is not None:
        known.update(have)
        known.update(want)
    return made


class Partitions:
    """The days a writer knows to have a partition (per engine; filled from the catalog)."""

    def __init__(self) -> None:
        self.known: set[int] | None = None

    def ensure(self, conn: Connection, times: Iterable[float]) -> None:
        """Make sure the days of ``times`` (and each next day, ahead) have a partition."""
        if self.known is None:
            self.known = set(partitions(conn))
        days = {day_of(t) for t in times}
        days |= {d + 1 for d in days}
        if not days <= self.known:
            create_days(conn, days, self.known)

    def forget(self) -> None:
        self.known = None


_PARTS: "weakref.WeakKeyDictionary[Engine, Partitions]" = weakref.WeakKeyDictionary()


def known(engine: Engine) -> Partitions:
    p = _PARTS.get(engine)
    if p is None:
        p = _PARTS[engine] = Partitions()
    return p


def insert_chunks(conn: Connection, rows: list[dict[str, Any]]) -> None:
    """Write ``obs_chunks`` rows: their days' partitions first, then one COPY."""
    known(conn.engine).ensure(conn, (r["t_min"] for r in rows))
    cols = tuple(rows[0])
    copy_rows(conn, PARENT, cols, ([r[c] for c in cols] for r in rows))


def partition(conn: Connection) -> None:
    """Turn an ordinary ``obs_chunks`` into one partitioned by day on ``t_min``, every row
    and the id sequence kept. Does nothing when it already is partitioned."""
    if is_partitioned(conn):
        return
    x = conn.exec_driver_sql
    indexes = x("SELECT i.relname, pg_get_indexdef(i.oid) FROM pg_index x "
                "JOIN pg_class i ON i.oid = x.indexrelid WHERE x.indrelid = "
                "to_regclass(%(n)s) AND NOT x.indisprimary", {"n": PARENT}).all()
    x(f"ALTER TABLE {PARENT} RENAME TO {PARENT}_plain")
    for name, _ in indexes:
        x(f'ALTER INDEX "{name}" RENAME TO "{name}_plain"')
    seq = x(f"SELECT pg_get_serial_sequence('{PARENT}_plain', 'id')").scalar()
    x(f"CREATE TABLE {PARENT} (LIKE {PARENT}_plain INCLUDING DEFAULTS, "
      f"CONSTRAINT pk_{PARENT} PRIMARY KEY (id, t_min), "
      f"CONSTRAINT fk_{PARENT}_bed FOREIGN KEY (bed_id) REFERENCES beds (id)) "
      f"PARTITION BY RANGE (t_min)")
    for _, ddl in indexes:      # the same definitions, now on the partitioned table
        x(ddl)
    lo, hi = x(f"SELECT min(t_min), max(t_min) FROM {PARENT}_plain").one()
    if lo is not None:
        create_days(conn, range(day_of(lo), day_of(hi) + 2))
        x(f"INSERT INTO {PARENT} SELECT * FROM {PARENT}_plain")
    if seq:
        x(f"ALTER SEQUENCE {seq} OWNED BY {PARENT}.id")
    x(f"DROP TABLE {PARENT}_plain")


def droppable(conn: Connection, cutoff: float) -> list[tuple[int, str]]:
    """Partitions that end at or before ``cutoff`` and hold no chunk reaching past it."""
    out = []
    for d, name in sorted(partitions(conn).items()):
        if (d + 1) * DAY > cutoff:
            continue
        newest = conn.exec_driver_sql(f'SELECT max(t_max) FROM "{name}"').scalar()
        if newest is None or newest < cutoff:
            out.append((d, name))
    return out


def drop(conn: Connection, names: Sequence[str]) -> None:
    for n in names:
        conn.exec_driver_sql(f'DROP TABLE "{n}"')


# --------------------------------------------------------------------------- COPY


def _sa_error(conn: Connection, sql: str, e: Any) -> sa_exc.StatementError:
    """A psycopg error as the SQLAlchemy exception ``execute`` would have raised; a lost
    connection is invalidated so the pool does not hand it out again."""
    dialect = conn.dialect
    dbapi_conn = conn.connection.dbapi_connection
    lost = bool(dialect.is_disconnect(e, dbapi_conn, None))
    if lost:
        conn.invalidate(e)
    return sa_exc.DBAPIError.instance(sql, None, e, dialect.loaded_dbapi.Error,
                                      hide_parameters=True, connection_invalidated=lost,
                                      dialect=dialect)


def copy_rows(conn: Connection, table: str, cols: Sequence[str],
              rows: Iterable[Sequence[Any]]) -> None:
    """``COPY table (cols) FROM STDIN`` of these rows (values in ``cols`` order), in the
    connection's transaction."""
    sql = f"COPY {table} ({', '.join(cols)}) FROM STDIN"
    dbapi_error = conn.dialect.loaded_dbapi.Error
    cur = conn.connection.dbapi_connection.cursor()  # type: ignore[union-attr]
    try:
        with cur.copy(sql) as cp:
            for r in rows:
                cp.write_row(r)
    except dbapi_error as e:
        raise _sa_error(conn, sql, e) from e
    except (ValueError, TypeError, OverflowError, UnicodeError) as e:
        raise sa_exc.StatementError(str(e).splitlines()[0] if str(e) else "", sql, None,
                                    e) from e
    finally:
        cur.close()
