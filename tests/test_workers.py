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
