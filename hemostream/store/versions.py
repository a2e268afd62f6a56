"""Schema versions (Alembic). A database carries its revision in ``alembic_version``.

- a new (empty) database is created at the newest revision (:func:`create_at_head`);
- ``hemostream db upgrade --db URL`` (:func:`upgrade`) migrates an older one; a database of
  release 0.1.0 has no version table and is recognised by its tables;
- ``run``, ``replay`` and the readers refuse any other revision (:func:`check`), saying which
  command upgrades it.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from sqlalchemy import create_engine, event, inspect
from sqlalchemy.engine import Connection, Engine

MIGRATIONS = Path(__file__).resolve().parent.parent / "migrations"


class SchemaError(RuntimeError):
    """The database's schema is not the one this release writes."""


def _config(conn: Connection | None = None):
    from alembic.config import Config as AlembicConfig

    cfg = AlembicConfig()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    if conn is not None:
        cfg.attributes["connection"] = conn
    return cfg


_REV = re.compile(r'^(down_revision|revision)\s*=\s*["\']([^"\']+)["\']', re.M)
_HEAD: list[str] = []


def head() -> str:
    """The newest revision: the one no migration names as its ``down_revision``. Read from
    the migration files' assignments (a start-up need not import Alembic;
    tests/test_migrations.py holds it to Alembic's own answer)."""
    if not _HEAD:
        revs: set[str] = set()
        downs: set[str] = set()
        for f in (MIGRATIONS / "versions").glob("*.py"):
            for key, val in _REV.findall(f.read_text(encoding="utf-8")):
                (revs if key == "revision" else downs).add(val)
        heads = revs - downs
        if len(heads) != 1:
            from alembic.script import ScriptDirectory
            return str(ScriptDirectory.from_config(_config()).get_current_head())
        _HEAD.append(heads.pop())
    return _HEAD[0]


def current(conn: Connection) -> str | None:
    """The database's revision: from ``alembic_version``, else recognised from its tables
    (``0001`` release 0.1.0, ``0002`` with config_snapshots); None for an empty database."""
    names = set(inspect(conn).get_table_names())
    if "alembic_version" in names:
        revs = [r[0] for r in conn.exec_driver_sql("SELECT version_num FROM alembic_version")]
        if len(revs) == 1:
            return str(revs[0])
        if len(revs) > 1:
            return "unknown"
    if "observations" in names:
        return "0002" if "config_snapshots" in names else "0001"
    if "messages" in names:
        return "unknown"
    return None


def create_at_head(engine: Engine, metadata: Any) -> None:
    """Create every table of an empty database and stamp it at the newest revision."""
    from alembic import command

    metadata.create_all(engine)
    with engine.begin() as conn:
        if conn.dialect.name == "postgresql":
            from .pg import partition       # what migration 0005_pg_partitions makes
            partition(conn)
        command.stamp(_config(conn), "head")


def upgrade_hint(url: str) -> str:
    from ..core.redact import redact
    return f"hemostream db upgrade --db {redact(url)}"


def check(engine: Engine, url: str) -> None:
    from ..core.redact import redact
    with engine.connect() as conn:
        rev = current(conn)
    want = head()
    if rev != want:
        raise SchemaError(
            f"database {redact(url)!r} has schema revision {rev} and this release needs {want}; "
            f"upgrade it first with: {upgrade_hint(url)}")


def _transactional(url: str) -> Engine:
    """An engine whose transactions also cover DDL (SQLite: BEGIN issued explicitly)."""
    engine = create_engine(url)
    if engine.dialect.name == "sqlite":
        @event.listens_for(engine, "connect")
        def _connect(dbapi_conn, _rec):  # pragma: no cover - sqlite only
            dbapi_conn.isolation_level = None

        @event.listens_for(engine, "begin")
        def _begin(conn):  # pragma: no cover - sqlite only
            conn.exec_driver_sql("BEGIN")
    return engine


def upgrade(url: str, metadata: Any) -> tuple[str | None, str]:
    """Migrate the database at ``url`` to the newest revision, in one transaction.
    Returns (revision before, revision after)."""
    from alembic import command

    engine = _transactional(url)
    try:
        with engine.connect() as conn:
            before = current(conn)
        if before is None:
            create_at_head(engine, metadata)
            return None, head()
        if before == "unknown":
            raise SchemaError(f"database {url!r}: tables of an unknown schema, not upgraded")
        with engine.begin() as conn:
            cfg = _config(conn)
            from alembic.runtime.migration import MigrationContext
            if MigrationContext.configure(conn).get_current_revision() is None:
                command.stamp(cfg, before)
            command.upgrade(cfg, "head")
        if engine.dialect.name == "sqlite" and before != head():
            raw = engine.raw_connection()       # give the moved rows' pages back
            try:
                raw.cursor().execute("VACUUM")
            finally:
                raw.close()
        return before, head()
    finally:
        engine.dispose()
