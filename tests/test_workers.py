"""Workers sharing units by lease, on Mosquitto (MQTT 5): the kill test (tests/workers_e2e.py)
and the lease rules on their own."""

from __future__ import annotations

from hemostream.live.leases import id_base, share

from live_fixtures import broker  # noqa: F401  (fixture)
from workers_e2e import check, run_kill_test


def test_shares_are_even_and_id_blocks_disjoint():
    units = [f"u{i}" for i in range(12)]
    for n in range(1, 8):
        names = [f"w{i}" for i in range(n)]
        got = [share(units, names, w) for w in names]
        assert sum(got) == 12 and max(got) - min(got) <= 1
    a, b = id_base(7), id_base(8)
    assert a["messages"] + (1 << 32) - 1 < b["messages"]
    assert a["beds"] + 1023 < b["beds"] < 2**31


def test_three_workers_twelve_units_one_killed_one_joining(tmp_path, broker):  # noqa: F811
    check(run_kill_test(tmp_path, broker.url(), "5"))


# --------------------------------------------------------------------------- leases on PG

import subprocess  # noqa: E402
import time  # noqa: E402

import pytest  # noqa: E402

from hemostream.live.leases import Leases  # noqa: E402
from hemostream.store import Writer, open_engine  # noqa: E402
from hemostream.store.writer import Fenced  # noqa: E402

from live_fixtures import PY, ROOT  # noqa: E402
from workers_e2e import Database  # noqa: E402


@pytest.fixture
def pg():
    db = Database()
    yield db
    db.drop()


def test_a_lease_moves_only_when_it_ran_out_and_fences_the_old_owner(pg):
    engine = open_engine(pg.url)
    try:
        a, b = Leases(engine, "wa", 0.6), Leases(engine, "wb", 0.6)
        ta = a.claim("W01")
        assert ta is not None and b.claim("W01") is None        # held: not taken
        with engine.begin() as c:
            a.guard("W01", ta)(c)                                # the owner may write
        time.sleep(0.8)                                          # wa stops renewing
        tb = b.claim("W01")
        assert tb is not None and tb > ta                        # a new, larger token
        assert a.renew({"W01": ta}, {}) == set()                 # wa learns it lost it
        w = Writer(engine)
        w.guard = a.guard("W01", ta)                             # wa's writer, too late
        w.submit({"beds": [{"id": 5, "unit": "W01", "bed": "bed-01"}]})
        with pytest.raises(Exception):
            w.flush()
        assert isinstance(w.error, Fenced)
        assert pg.rows("SELECT count(*) FROM beds")[0][0] == 0    # nothing committed
        w.give_up()
        assert b.renew({"W01": tb}, {"W01": (time.time(), 0.25)}) == {"W01"}
        assert pg.rows("SELECT lag_s FROM worker_leases")[0][0] == 0.25
    finally:
        engine.dispose()


def test_status_shows_owner_since_and_lag(pg):
    engine = open_engine(pg.url)
    try:
        a = Leases(engine, "ward-worker-a", 10)
        a.heartbeat()
        tok = a.claim("W07")
        a.renew({"W07": tok}, {"W07": (time.time(), 0.42)})
    finally:
        engine.dispose()
    r = subprocess.run([PY, "-m", "hemostream.cli", "status", "--db", pg.url], cwd=ROOT,
                       capture_output=True, text=True, timeout=60,
                       env={"COLUMNS": "160", "PATH": "/usr/bin:/bin"})
    assert r.returncode == 0, r.stderr
    assert "W07" in r.stdout and "ward-worker-a" in r.stdout and "0.42 s" in r.stdout
    assert "s left" in r.stdout


# --------------------------------------------------------------------------- rebuilding


def test_the_stored_past_rebuilds_the_same_alarms_sealed_chunks_included(tmp_path):
    """A unit's messages read back from the store (most of them already sealed into
    compressed chunks) and fed to a fresh processor give the very alarm events the first
    processing stored, and leave the same alarms active."""
    import json as _json

    from hemostream.core.config import Config
    from hemostream.core.processor import Processor, iso
    from hemostream.pipeline import make_rules
    from hemostream.store import rows_of
    from hemostream.store.history import unit_past

    cfg = Config.model_validate({
        "units": [{"id": "W01", "beds": ["bed-01", "bed-02"]}],
        "store": {"chunk_messages": 40, "stage_messages": 50},
        "rules": {"limits": {"HR": {"low": 40.0, "high": 140.0, "delay_s": 1.0,
                                    "clear_delay_s": 1.0, "latching": False}}}})
    first = Processor(cfg, rules=make_rules(cfg))
    engine = open_engine(f"sqlite:///{tmp_path / 'past.db'}")
    w = Writer(engine, store_cfg=cfg.store)
    t0 = 1_780_000_000.0
    admit = {"v": 1, "time": iso(t0), "height_cm": 171, "weight_kg": 70,
             "limits": {"HR": {"high": 160}}}
    first.feed("hemo/W01/bed-02/admit", _json.dumps(admit), t0)
    for k in range(300):                        # 60 s at 5 Hz, two beds
        t = t0 + 0.5 + k * 0.2
        for bed, hr in (("bed-01", 165 if (k // 15) % 2 == 0 else 80), ("bed-02", 155)):
            first.feed(f"hemo/W01/{bed}/obs", _json.dumps({
                "v": 1, "device": f"gw-{bed}", "seq": k, "time": iso(t),
                "obs": [{"param": "HR", "value": hr, "unit": "/min"}]}), t + 0.01)
        if k % 5 == 0:
            first.tick(t + 0.01)
        if k % 50 == 49:
            w.submit(rows_of(first.drain()))
    w.submit(rows_of(first.drain()))
    w.flush()
    stored = pg_free_rows(engine, "SELECT alarm_id, transition, time FROM alarm_events "
                                  "ORDER BY id")
    assert pg_free_rows(engine, "SELECT count(*) FROM obs_chunks WHERE sealed")[0][0] > 0
    with engine.connect() as conn:
        past = unit_past(conn, "W01", 1e9)
    assert len(past.messages) == 601 and len(past.identities) == 601
    again = Processor(cfg, rules=make_rules(cfg), known_beds=past.beds)
    tick_at = None
    for rx, topic, payload in past.messages:
        if tick_at is None or rx >= tick_at + 1.0:
            if tick_at is not None:
                again.tick(rx)
            tick_at = rx
        again.feed(topic, payload, rx)
    rebuilt = [(e["alarm_id"], e["transition"], e["time"]) for e in again.drain().alarm_events]
    assert rebuilt == [tuple(r) for r in stored]
    for bed in ("W01/bed-01", "W01/bed-02"):
        assert again.rules.alarm_state(bed) == first.rules.alarm_state(bed)
    # bed-02 was admitted with HR high 160, so its steady 155 never alarms (the default 140
    # would): a short window still feeds that older admission first
    assert rebuilt and not any("bed-02" in a for a, *_ in rebuilt)
    with engine.connect() as conn:
        recent = unit_past(conn, "W01", 20.0)
    assert recent.messages[0][1] == "hemo/W01/bed-02/admit" and len(recent.messages) < 250
    short = Processor(cfg, rules=make_rules(cfg), known_beds=recent.beds)
    for rx, topic, payload in recent.messages:
        short.feed(topic, payload, rx)
    assert not any("bed-02" in e["alarm_id"] for e in short.drain().alarm_events)
    w.close()
    engine.dispose()


def pg_free_rows(engine, sql: str) -> list:
    from sqlalchemy import text
    with engine.connect() as c:
        return list(c.execute(text(sql)))
