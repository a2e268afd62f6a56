"""The live path on a second broker implementation: NATS with JetStream serving MQTT 3.1.1
(sessions kept in JetStream streams). The workers' kill test (tests/workers_e2e.py) runs on
it unchanged, with ``broker.protocol = "3.1.1"``."""

from __future__ import annotations

import pytest

from natsd import Nats
from workers_e2e import check, run_kill_test


@pytest.fixture(scope="module")
def nats(tmp_path_factory):
    n = Nats(tmp_path_factory.mktemp("nats")).start()
    yield n
    n.stop()


def test_three_workers_twelve_units_one_killed_one_joining_on_nats(tmp_path, nats):
    check(run_kill_test(tmp_path, nats.url, "3.1.1"))
