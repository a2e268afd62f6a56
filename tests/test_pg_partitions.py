"""PostgreSQL at scale, on the real server (127.0.0.1:5432, database test): obs_chunks
partitioned by day, the 0004_worker_leases -> 0005_pg_partitions upgrade keeping every row, pruning that
drops whole partitions, and the COPY write path giving what the SQLite path gives.

CI makes sure the server runs; when it does not, these tests fail rather than skip.
"""

import datetime as dt
import json

import pytest
from sqlalchemy import create_engine, insert, select

from hemostream import query
from hemostream.core.config import Config
from hemostream.core.wire import format_epoch as iso
from hemostream.replay import replay_file
from hemostream.store import TABLES, Base, message_count, open_engine, pg, versions
from hemostream.store.retention import prune, stats

pytestmark = pytest.mark.postgres

#: 2026-11-30 23:50 UTC (stdlib calendar): a recording that crosses midnight
T0 = dt.datetime(2026, 11, 30, 23, 50, tzinfo=dt.timezone.utc).timestamp()


def _line(s, bed="bed-01"):
    return json.dumps({"rx": iso(T0 + s + 0.04), "topic": f"hemo/SDU1/{bed}/obs", "payload": {
        "v": 1, "device": f"gw-{bed}", "seq": s, "time": iso(T0 + s),
        "obs": [{"param": "HR", "value": 60 + s % 13, "unit": "/min"},
                {"param": "CVP", "value": 10.2, "unit": "cm[H2O]"},
                {"param": "ABP_MEAN", "value": 80 + s % 7, "unit": "mm[Hg]"}]}})


@pytest.fixture
def midnight(tmp_path):
    """Two beds, 20 minutes across midnight; sealed every 300 messages."""
    rec = tmp_path / "r.jsonl"
    rec.write_text("".join(_line(s, b) + "\n" for s in range(1200)
                           for b in ("bed-01", "bed-02")))
    conf = tmp_path / "c.toml"
    conf.write_text("[store]\nchunk_messages = 300\nbatch_rows = 500\n")
    return rec, conf


def _days(url):
    e = open_engine(url, create=False)
    with e.connect() as c:
        parts = pg.partitions(c)
        assert pg.is_partitioned(c)
    e.dispose()
    return parts


def test_new_database_is_partitioned_and_days_are_made_ahead(midnight, pg_url, tmp_path):
    rec, conf = midnight
    from hemostream.config import load_for_command
    replay_file(rec, pg_url, load_for_command(str(conf)))
    d0 = pg.day_of(T0)
    # the writer made both days it wrote, and the next one ahead
    assert sorted(_days(pg_url)) == [d0, d0 + 1, d0 + 2]
    assert pg.name_of(d0 + 1) == "obs_chunks_d20261201"
    lite = f"sqlite:///{tmp_path / 'l.db'}"
    replay_file(rec, lite, load_for_command(str(conf)))
    a, b = open_engine(pg_url, create=False), open_engine(lite, create=False)
    for kind in ("observations", "derived"):
        ra, rb = list(query.rows(a, kind)), list(query.rows(b, kind))
        assert ra == rb and len(ra) > 0, kind
    assert message_count(a) == message_count(b) == 2400
    s = stats(a)
    assert s["tables"]["obs_chunks"]["bytes"] > 0       # the partitions' sizes, summed
    a.dispose()
    b.dispose()


def test_upgrade_from_0004_partitions_every_row(midnight, pg_url, tmp_path):
    """A PostgreSQL database at revision 0004_worker_leases (plain obs_chunks) is upgraded in
    place."""
    rec, conf = midnight
    from hemostream.config import load_for_command
    lite = f"sqlite:///{tmp_path / 'l.db'}"
    replay_file(rec, lite, load_for_command(str(conf)))
    src = open_engine(lite, create=False)
    dst = create_engine(pg_url)
    Base.metadata.create_all(dst)            # the 0004 tables, obs_chunks not partitioned
    with dst.begin() as d:                   # and without the indexes of 0005
        for ix in ("ix_obs_chunks_bed_sealed", "ix_obs_chunks_mid_max", "ix_obs_chunks_seq_max"):
            d.exec_driver_sql(f"DROP INDEX {ix}")
        d.exec_driver_sql("DROP TABLE obs_staging")          # 0007
    with src.connect() as s, dst.begin() as d:
        for name in ("beds", "messages", "obs_chunks", "admissions", "notes", "commands",
                     "rejected", "alarm_events", "config_snapshots", "minute_stats"):
            rows = [dict(r._mapping) for r in s.execute(select(TABLES[name]))]
            if rows:
                d.execute(insert(TABLES[name]), rows)
        d.exec_driver_sql("SELECT setval(pg_get_serial_sequence('obs_chunks', 'id'), "
                          "(SELECT max(id) FROM obs_chunks))")
        from alembic import command
        command.stamp(versions._config(d), "0004_worker_leases")
    dst.dispose()
    with pytest.raises(Exception, match="db upgrade"):
        open_engine(pg_url)
    assert versions.upgrade(pg_url, Base.metadata) == ("0004_worker_leases", versions.head())
    assert sorted(_days(pg_url))[:2] == [pg.day_of(T0), pg.day_of(T0) + 1]
    a = open_engine(pg_url)
    with a.connect() as c:                   # every index on the partitioned table
        ixs = {r[0] for r in c.exec_driver_sql(
            "SELECT indexname FROM pg_indexes WHERE tablename = 'obs_chunks' "
            "AND schemaname = current_schema()")}
    assert ixs == {"pk_obs_chunks", "ix_obs_chunks_bed_time", "ix_obs_chunks_bed_sealed",
                   "ix_obs_chunks_mid_max", "ix_obs_chunks_seq_max"}
    for kind in ("observations", "derived", "admissions"):
        assert list(query.rows(a, kind)) == list(query.rows(src, kind)), kind
    assert message_count(a) == message_count(src)
    a.dispose()
    # new data goes on into the partitioned table, ids from the kept sequence
    again = replay_file(rec, pg_url, load_for_command(str(conf)))
    assert again.messages == 0 and again.duplicates == 2400
    src.dispose()


def test_prune_drops_whole_day_partitions(midnight, pg_url):
    rec, conf = midnight
    from hemostream.config import load_for_command
    replay_file(rec, pg_url, load_for_command(str(conf)))
    e = open_engine(pg_url, create=False)
    ret = Config().store.retention                       # 30 days of full-rate data
    d0 = pg.day_of(T0)
    # cutoff in the middle of the second day: only the first day's partition can go
    now = (d0 + 1) * 86400 + 3600 + ret.full_rate_days * 86400
    before = len(list(query.rows(e, "observations")))
    dry = prune(e, ret, now, dry_run=True)
    assert dry.partitions_dropped == 1
    assert sorted(_days(pg_url)) == [d0, d0 + 1, d0 + 2]          # a dry run keeps them
    done = prune(e, ret, now)
    assert done.partitions_dropped == 1 and done.removed == dry.removed
    assert sorted(_days(pg_url)) == [d0 + 1, d0 + 2]
    left = list(query.rows(e, "observations"))
    # what went: every observation of the 10 minutes before midnight (each chunk went whole)
    gone = before - len(left)
    assert gone == done.removed["observations"] >= 2 * 600 * 3
    assert all(dt.datetime.fromisoformat(r["time"].replace("Z", "+00:00")).timestamp()
               >= (d0 + 1) * 86400 - 300 for r in left)
    # everything older than the end of the recording: the rest goes too (rows or partitions)
    later = prune(e, ret, T0 + 1200 + ret.full_rate_days * 86400 + 86400 * 2)
    assert list(query.rows(e, "observations")) == []
    assert later.partitions_dropped >= 1
    e.dispose()
