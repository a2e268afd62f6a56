"""Schema versions: a database made by release 0.1.0 upgrades without losing a row."""

import gzip
import shutil
import sqlite3
from pathlib import Path

import pytest

from hemostream import query
from hemostream.app.cli import main
from hemostream.core.wire import format_epoch as iso
from hemostream.replay import replay_file
from hemostream.store import StoreError, iter_messages, open_engine, versions

DATA = Path(__file__).resolve().parent / "data"


@pytest.fixture
def old_db(tmp_path):
    p = tmp_path / "old.db"
    with gzip.open(DATA / "release-0.1.0.db.gz", "rb") as f, open(p, "wb") as o:
        shutil.copyfileobj(f, o)
    return p


def _old_rows(p: Path, sql: str) -> list[tuple]:
    con = sqlite3.connect(p)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_release_0_1_0_upgrades_with_every_row(old_db, capsys):
    url = f"sqlite:///{old_db}"
    obs = _old_rows(old_db, "SELECT o.time, b.unit, b.bed, o.param, o.value, o.unit, o.status, "
                            "o.raw_value, o.raw_unit, o.late FROM observations o JOIN beds b "
                            "ON b.id = o.bed_id ORDER BY o.time, o.id")
    der = _old_rows(old_db, "SELECT d.time, b.bed, d.param, d.value, d.unit, d.inputs FROM "
                            "derived d JOIN beds b ON b.id = d.bed_id ORDER BY d.time, d.id")
    msgs = _old_rows(old_db, "SELECT id, bed_id, rx, topic, kind, device, seq, time, late, "
                             "n_obs, digest FROM messages ORDER BY id")
    others = {t: _old_rows(old_db, f"SELECT * FROM {t} ORDER BY id") for t in (
        "alarm_events", "notes", "commands", "admissions", "rejected", "beds")}
    # counts from tests/data/release-0.1.0.md
    assert (len(obs), len(der), len(msgs)) == (7070, 934, 843)

    with pytest.raises(StoreError, match="hemostream db upgrade --db"):
        open_engine(url)                               # run/replay refuse the old schema
    with pytest.raises(StoreError, match="db upgrade"):
        replay_file(DATA / "handmade.jsonl", url)
    assert main(["db", "upgrade", "--db", url]) == 0
    assert f"0001 to {versions.head()}" in capsys.readouterr().err

    engine = open_engine(url, create=False)
    got = [tuple(r.values()) for r in query.rows(engine, "observations")]
    # an old row's quality is its status as received (the wire format's status names;
    # "valid" is "ok"): the release stored no artifact marks
    want = [(iso(t), u, b, p, v, un, st, rv, ru, bool(late), "ok" if st == "valid" else st)
            for t, u, b, p, v, un, st, rv, ru, late in obs]
    assert got == want                                 # every row, value-exact, same order
    assert sum(1 for r in got if r[-1] != "ok") == 1   # the one questionable value
    gotd = [(r["time"], r["bed"], r["param"], r["value"], r["unit"], r["inputs"],
             r["quality"]) for r in query.rows(engine, "derived")]
    import json
    wantd = [(iso(t), b, p, v, u, [[q, iso(x)] for q, x in json.loads(i)], "ok")
             for t, b, p, v, u, i in der]
    assert gotd == wantd
    stored = [tuple(m[c] for c in ("id", "bed_id", "rx", "topic", "kind", "device", "seq",
                                  "time", "late", "n_obs", "digest"))
              for m in iter_messages(engine)]
    assert stored == [tuple(bool(x) if k == 8 else x for k, x in enumerate(m)) for m in msgs]
    for t, rows in others.items():
        assert _old_rows(old_db, f"SELECT * FROM {t} ORDER BY id") == rows, t
    with engine.connect() as c:
        assert versions.current(c) == versions.head()
    assert main(["db", "upgrade", "--db", url]) == 0   # again: nothing to do
    assert "already at revision" in capsys.readouterr().err


def test_upgraded_database_takes_new_data_and_dedups(old_db):
    url = f"sqlite:///{old_db}"
    assert main(["db", "upgrade", "--db", url]) == 0
    again = replay_file(DATA / "handmade.jsonl", url)
    assert again.messages > 0
    twice = replay_file(DATA / "handmade.jsonl", url)
    assert twice.messages == 0                         # identities resumed from the database


def test_new_database_is_created_at_head(tmp_path):
    engine = open_engine(f"sqlite:///{tmp_path / 'new.db'}")
    with engine.connect() as c:
        assert versions.current(c) == versions.head()


def test_migrations_ship_inside_the_package():
    assert (versions.MIGRATIONS / "env.py").is_file()
    assert versions.MIGRATIONS.parent.name == "hemostream"
    assert sorted(p.name[:4] for p in (versions.MIGRATIONS / "versions").glob("0*.py")) == [
        "0001", "0002", "0003", "0004", "0005", "0006", "0007"]


def test_head_read_from_the_files_is_alembics():
    from alembic.script import ScriptDirectory
    assert versions.head() == ScriptDirectory.from_config(versions._config()).get_current_head()
