"""`hemostream run --hl7-listen` on a real Mosquitto: a simulated ward sent as HL7 v2 (IHE
PCD-01) over MLLP by `hemostream simulate --publish-hl7` is stored like the same ward as MQTT
JSON, every message answered AA only after it was committed, and SIGTERM stops both intakes.
The ward (SDU2, beds bed-01/bed-02) is invented."""

from __future__ import annotations

import signal
import subprocess
import sys

import pytest

from live_fixtures import ROOT, broker, query, wait_until, write_toml  # noqa: F401
from mosquitto import free_ports

pytestmark = pytest.mark.broker


def _run_listening(args: list[str], port: int, tmp_path) -> tuple[subprocess.Popen, object]:
    """`hemostream run ARGS` in a child process, once its MLLP listener takes connections."""
    import socket
    log = open(tmp_path / "run.log", "wb")
    p = subprocess.Popen([sys.executable, "-m", "hemostream.cli", "run", *args], cwd=ROOT,
                         stderr=log, stdout=subprocess.DEVNULL)

    def listening() -> bool:
        assert p.poll() is None, (tmp_path / "run.log").read_text()
        try:
            socket.create_connection(("127.0.0.1", port), 0.3).close()
            return True
        except OSError:
            return False
    wait_until(listening, 30, "the MLLP listener")
    return p, log


def _simulate_to(port: int) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "hemostream.cli", "simulate", "--scenario", "stable",
         "--beds", "2", "--duration", "30s", "--seed", "3", "--publish-hl7",
         f"127.0.0.1:{port}", "--speed", "1000"], cwd=ROOT, capture_output=True, text=True,
        timeout=120)


def test_run_takes_hl7_over_mllp_beside_mqtt(broker, tmp_path):  # noqa: F811
    db = f"sqlite:///{tmp_path / 'hl7.db'}"
    conf = write_toml(tmp_path / "run.toml", broker.url(), db, "hs-hl7-run", beds=2)
    port, = free_ports(1)
    p, log = _run_listening(["--config", str(conf), "--hl7-listen", f"127.0.0.1:{port}"],
                            port, tmp_path)
    try:
        # config units are SDU9 (write_toml); the simulated ward is SDU2
        sim = _simulate_to(port)
        assert sim.returncode in (0, 1), sim.stderr
        assert "sent:" in sim.stderr, sim.stderr
    finally:
        p.send_signal(signal.SIGTERM)
        p.wait(30)
        log.close()
    out = (tmp_path / "run.log").read_text()
    assert p.returncode == 0, out
    # unit SDU2 is not served by this configuration (units = SDU9): each message is a reject
    # with a reason, answered AE, and nothing else is lost
    counts = query(db, "SELECT category, count(*) FROM rejected GROUP BY category")
    assert counts and all(c in ("unit_not_served", "unknown_location") for c, _ in counts), \
        counts
    assert "AE" in sim.stderr


def test_run_stores_a_mapped_hl7_ward(broker, tmp_path):  # noqa: F811
    db = f"sqlite:///{tmp_path / 'hl7.db'}"
    port, = free_ports(1)
    conf = tmp_path / "run.toml"
    conf.write_text(
        'instance = "hs-hl7-map"\n\n[[units]]\nid = "SDU2"\nbeds = ["bed-01", "bed-02"]\n\n'
        f'[store]\nurl = "{db}"\n\n[broker]\nurl = "{broker.url()}"\nclient_id = "hs-hl7-map"\n'
        f'\n[intake.hl7]\nlisten = "127.0.0.1:{port}"\n\n'
        '[intake.hl7.locations]\n"SDU2^^bed-01" = { unit = "SDU2", bed = "bed-01" }\n'
        '"SDU2^^bed-02" = { unit = "SDU2", bed = "bed-02" }\n')
    p, log = _run_listening(["--config", str(conf)], port, tmp_path)
    try:
        sim = _simulate_to(port)
        assert sim.returncode == 0, sim.stderr
        sent_aa = int(sim.stderr.split("AA ")[1].split()[0].rstrip(","))
        # acknowledged means committed: every AA is already a stored message
        stored = query(db, "SELECT count(*) FROM messages")[0][0]
        assert stored == sent_aa == 60
        assert query(db, "SELECT count(*) FROM observations")[0][0] > 60 * 5
    finally:
        p.send_signal(signal.SIGTERM)
        p.wait(30)
        log.close()
    assert p.returncode == 0, (tmp_path / "run.log").read_text()
