"""SQLite file space: pages freed by deleted rows given back to the file system."""

from __future__ import annotations

from sqlalchemy.engine import Engine


def give_back_free_pages(engine: Engine) -> int:
    """SQLite with ``auto_vacuum=INCREMENTAL`` (every file hemostream creates): give the
    pages freed by deleted rows back to the file system; how many. (Python's sqlite3 steps
    ``PRAGMA incremental_vacuum`` once, which frees one page, so it is run once per page, in
    one transaction: about 25 us a page.) Other databases: nothing, 0."""
    if engine.dialect.name != "sqlite":
        return 0
    with engine.connect() as conn:
        raw = conn.connection.dbapi_connection
        assert raw is not None
        if raw.execute("PRAGMA auto_vacuum").fetchone()[0] != 2:
            return 0
        n = int(raw.execute("PRAGMA freelist_count").fetchone()[0])
        if n:
            raw.commit()
            raw.execute("BEGIN")
            for _ in range(n):
                raw.execute("PRAGMA incremental_vacuum(1)")
            raw.execute("COMMIT")
            # the file itself shrinks when the WAL is written back (best effort: a reader
            # still on an older snapshot leaves it to the next checkpoint)
            raw.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchall()
    return n
