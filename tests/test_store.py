"""The compact store: value-exact columns, chunks sealed and merged, retention, sizes."""

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hemostream import query
from hemostream.app.cli import main
from hemostream.core.config import Config
from hemostream.replay import replay_file
from hemostream.store import (ObsChunk, iter_messages, message_count, open_engine, codec)
from hemostream.store.retention import prune, stats
from sqlalchemy import func, select

finite = st.floats(allow_nan=False, allow_infinity=False)


@settings(max_examples=200, deadline=None)
@given(st.lists(finite, max_size=50), st.lists(st.integers(-2 ** 63, 2 ** 63 - 1), max_size=20))
def test_columns_round_trip_bit_for_bit(xs, ints):
    blk = {"f": np.array(xs, np.float64), "i": np.array(ints, np.int64),
           "s": [str(x)[:3] for x in xs], "b": np.array([x > 0 for x in xs], bool),
           "x_text": [repr(x) for x in xs]}
    out = codec.decode(codec.encode(blk, perm={"f": "s"}))
    assert out["f"].view(np.int64).tolist() == blk["f"].view(np.int64).tolist()
    assert out["i"].tolist() == ints
    assert out["s"] == blk["s"] and out["x_text"] == blk["x_text"]
    assert out["b"].tolist() == blk["b"].tolist()


def test_decimal_values_are_stored_as_small_integers():
    rnd = np.random.default_rng(1)
    v = np.round(70 + 10 * rnd.random(10_000), 1)        # one decimal, like a monitor's HR
    small = len(codec.encode({"v": v}))
    assert small < 2.5 * len(v)                          # of the 8 bytes of a double
    assert codec.decode(codec.encode({"v": v}))["v"].tolist() == v.tolist()


def _line(s, hr, bed="bed-01", t0=1796112000):
    from hemostream.core.wire import format_epoch as iso
    return json.dumps({"rx": iso(t0 + s + 0.04), "topic": f"hemo/SDU1/{bed}/obs", "payload": {
        "v": 1, "device": f"gw-{bed}", "seq": s, "time": iso(t0 + s),
        "obs": [{"param": "HR", "value": hr, "unit": "/min"},
                {"param": "CVP", "value": 10.2, "unit": "cm[H2O]"},
                {"param": "ABP_MEAN", "value": 80 + s % 7, "unit": "mm[Hg]"}]}})


def test_sealed_chunks_hold_messages_and_query_the_same(tmp_path):
    rec = tmp_path / "r.jsonl"
    rec.write_text("".join(_line(s, 60 + s % 13, bed) + "\n"
                           for s in range(250) for bed in ("bed-01", "bed-02")))
    small = Config.model_validate({"store": {"chunk_messages": 40, "chunk_segments": 3,
                                             "stage_messages": 30,
                                             "batch_rows": 50}})
    a, b = f"sqlite:///{tmp_path / 'a.db'}", f"sqlite:///{tmp_path / 'b.db'}"
    replay_file(rec, a, small)
    replay_file(rec, b)                                # default: nothing sealed yet
    ea, eb = open_engine(a, create=False), open_engine(b, create=False)
    with ea.connect() as c:
        sealed = c.execute(select(func.count()).select_from(ObsChunk.__table__)
                           .where(ObsChunk.__table__.c.sealed.is_(True))).scalar()
    assert sealed >= 2                                 # every bed's, its messages moved in
    for kind in ("observations", "derived"):
        ra, rb = list(query.rows(ea, kind)), list(query.rows(eb, kind))
        assert ra == rb and len(ra) > 0
    assert message_count(ea) == message_count(eb) == 500
    assert [m["seq"] for m in iter_messages(ea)] == [m["seq"] for m in iter_messages(eb)]
    cvp = list(query.rows(ea, "observations", bed="SDU1/bed-02", param="CVP", limit=3))
    # 10.2 cm H2O in mm Hg (1 cmH2O = 0.73556 mmHg, handbook factor, from memory)
    assert [r["raw_value"] for r in cvp] == [10.2] * 3
    assert math.isclose(cvp[0]["value"], 10.2 * 0.73556, rel_tol=1e-4)
    # restart over the sealed database: every identity is known again
    again = replay_file(rec, a, small)
    assert again.messages == 0 and again.duplicates == 500


@pytest.mark.parametrize("groups", [1, 16])
def test_staged_values_read_back_before_they_are_split(tmp_path, groups):
    """A batch is staged as one row of every bed's values: readers see staged values as
    well as segments and sealed chunks, each exactly once, the same as after the split."""
    from hemostream.replay import feed_line
    from hemostream.core.processor import Processor
    from hemostream.store import ObsStaging, rows_of, write_rows, chunker, configure_chunks
    lines = [_line(s, 60 + s % 13, bed).encode() for s in range(120)
             for bed in ("bed-01", "bed-02", "bed-03")]
    ref = tmp_path / "r.jsonl"
    ref.write_bytes(b"\n".join(lines) + b"\n")
    b_url = f"sqlite:///{tmp_path / 'b.db'}"
    replay_file(ref, b_url)
    want = {k: list(query.rows(open_engine(b_url, create=False), k))
            for k in ("observations", "derived")}
    engine = open_engine(f"sqlite:///{tmp_path / 'a.db'}")
    configure_chunks(engine, messages=40, segments=8, stage_messages=100, stage_s=3600,
                     stage_groups=groups)
    proc = Processor(Config(), publish=False)
    for i, line in enumerate(lines, 1):
        feed_line(proc, line, i, 1 << 20)
        if i % 25 == 0:                                # batches of 25 messages
            write_rows(engine, rows_of(proc.drain()))
    write_rows(engine, rows_of(proc.drain()))
    with engine.connect() as c:
        staged = c.execute(select(func.count()).select_from(ObsStaging.__table__)).scalar()
        sealed = c.execute(select(func.count()).select_from(ObsChunk.__table__)
                           .where(ObsChunk.__table__.c.sealed.is_(True))).scalar()
    assert staged >= 2 and sealed >= 3                 # all three kinds of rows at once
    got = {k: list(query.rows(engine, k)) for k in ("observations", "derived")}
    assert got == want and len(got["observations"]) == 3 * 120 * 3
    assert message_count(engine) == 360
    one = list(query.rows(engine, "observations", bed="SDU1/bed-02", param="HR"))
    assert [r["value"] for r in one] == [60 + s % 13 for s in range(120)]
    with engine.begin() as c:                          # what a closing writer does
        chunker(engine).compact_all(c)
    assert {k: list(query.rows(engine, k)) for k in ("observations", "derived")} == want
    assert [m["seq"] for m in iter_messages(engine)] == [m["seq"] for m in iter_messages(
        open_engine(b_url, create=False))]


def test_freed_pages_go_back_to_the_file_system(tmp_path):
    """Staged rows split, segments merged and messages moved leave free pages; a SQLite
    file hemostream made is incremental-vacuum, and the closing writer and a prune give
    them back (the file is what a unit's disk holds, docs/storage.md)."""
    import sqlite3
    rec = tmp_path / "r.jsonl"
    rec.write_text("".join(_line(s, 60 + s % 13, bed) + "\n"
                           for s in range(400) for bed in ("bed-01", "bed-02", "bed-03")))
    db = tmp_path / "f.db"
    cfg = Config.model_validate({"store": {"chunk_messages": 100, "stage_messages": 150,
                                           "batch_rows": 300}})
    replay_file(rec, f"sqlite:///{db}", cfg)
    c = sqlite3.connect(db)
    assert c.execute("PRAGMA auto_vacuum").fetchone()[0] == 2           # incremental
    assert c.execute("PRAGMA freelist_count").fetchone()[0] == 0
    c.close()
    before = db.stat().st_size
    rep = prune(open_engine(f"sqlite:///{db}", create=False), Config().store.retention,
                1796112000 + 31 * 86400.0)
    assert rep.removed["observations"] == 3 * 400 * 3 and rep.pages_freed > 0
    c = sqlite3.connect(db)
    assert c.execute("PRAGMA freelist_count").fetchone()[0] == 0
    c.close()
    assert db.stat().st_size < before


def test_prune_dry_run_then_prune(tmp_path, capsys):
    rec = tmp_path / "r.jsonl"
    rec.write_text("".join(_line(s, 60 + s % 13) + "\n" for s in range(180)))
    url = f"sqlite:///{tmp_path / 'p.db'}"
    replay_file(rec, url)
    engine = open_engine(url, create=False)
    ret = Config().store.retention
    later = 1796112000 + 31 * 86400.0
    dry = prune(engine, ret, later, dry_run=True)
    assert dry.removed == {"observations": 540, "derived": dry.removed["derived"],
                           "messages": 180}
    assert dry.minute_stats_added >= 3 * 3          # 3 parameters x 3 minutes, + derived
    assert len(list(query.rows(engine, "observations"))) == 540        # nothing went
    assert main(["db", "prune", "--db", url, "--dry-run", "--now",
                 "2027-01-01T00:00:00Z"]) == 0
    assert "would remove 540 observations" in capsys.readouterr().out
    done = prune(engine, ret, later)
    assert done.removed["observations"] == 540
    assert list(query.rows(engine, "observations")) == []
    assert message_count(engine) == 0
    with engine.connect() as c:
        ms = c.execute(select(ObsChunk.__table__)).all()
        assert ms == []
        from hemostream.store import MinuteStat
        hr = c.execute(select(MinuteStat.__table__).where(
            MinuteStat.__table__.c.param == "HR", MinuteStat.__table__.c.source == "obs")
            .order_by(MinuteStat.__table__.c.minute)).all()
    # the first minute's heart rates: 60 + s % 13 for s = 0..59, by hand with numpy's median
    first = [60 + s % 13 for s in range(60)]
    assert (hr[0].n, hr[0].min, hr[0].max, hr[0].median) == (60, 60, 72, float(np.median(first)))


def test_stats_per_table_and_bed_day(tmp_path, capsys):
    rec = tmp_path / "r.jsonl"
    rec.write_text("".join(_line(s, 70) + "\n" for s in range(120)))
    url = f"sqlite:///{tmp_path / 's.db'}"
    replay_file(rec, url)
    s = stats(open_engine(url, create=False))
    assert s["observations"] == 360 and s["messages"] == 120
    assert s["tables"]["obs_chunks"]["rows"] >= 1
    assert s["bed_days"] > 0 and s["bytes"] > 0
    assert main(["db", "stats", "--db", url]) == 0
    assert "MB per bed-day" in capsys.readouterr().out
