"""Shared fixtures: temporary SQLite databases, a PostgreSQL schema of a test's own, and the
shipped recordings."""

from __future__ import annotations

import os
import uuid
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DATA = Path(__file__).resolve().parent / "data"
#: the local PostgreSQL server (trust auth, database `test`)
PG = os.environ.get("HEMOSTREAM_TEST_PG", "postgresql+psycopg://127.0.0.1:5432/test")


@pytest.fixture
def db_url(tmp_path) -> str:
    return f"sqlite:///{tmp_path / 'test.db'}"


@pytest.fixture
def pg_url():
    """A URL whose search path is a fresh schema on the local PostgreSQL, dropped after."""
    from sqlalchemy import create_engine, text

    schema = f"hs_test_{uuid.uuid4().hex[:8]}"
    admin = create_engine(PG)
    with admin.begin() as c:
        c.execute(text(f"CREATE SCHEMA {schema}"))
    yield f"{PG}?options=-csearch_path%3D{schema}"
    with admin.begin() as c:
        c.execute(text(f"DROP SCHEMA {schema} CASCADE"))
    admin.dispose()


@pytest.fixture
def handmade() -> Path:
    return DATA / "handmade.jsonl"
