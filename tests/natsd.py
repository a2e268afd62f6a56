"""A real NATS server with JetStream and its MQTT listener, for the live tests.

NATS serves MQTT 3.1.1 and keeps each MQTT session (subscriptions, unacknowledged QoS 1
messages, retained messages) in JetStream streams: a second broker implementation besides
Mosquitto, one that clusters. Each instance gets its own configuration, free ports on
127.0.0.1 and a JetStream directory of its own; ``ack_wait`` (how long NATS waits for the
PUBACK of a QoS 1 message before it sends it again) is short so a hand-over test does not
wait the default 30 s for what a killed worker had in flight.

The binary is /usr/sbin/nats-server (Debian package ``nats-server``; .ci/run installs it).
A test that needs it and finds none fails.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

import pytest

from mosquitto import free_ports

NATS_SERVER = shutil.which("nats-server") or "/usr/sbin/nats-server"


def require_nats() -> None:
    if not os.access(NATS_SERVER, os.X_OK):
        pytest.fail(f"needs {NATS_SERVER} (Debian package nats-server); the NATS tests "
                    "spawn a real server - .ci/run installs it", pytrace=False)


class Nats:
    def __init__(self, d: Path, ack_wait_s: float = 2.0) -> None:
        self.dir = d
        d.mkdir(parents=True, exist_ok=True)
        self.port, self.mqtt_port = free_ports(2)
        (d / "nats.conf").write_text(
            f'server_name: "hs-test-{self.port}"\n'
            f'listen: "127.0.0.1:{self.port}"\n'
            f'jetstream {{\n  store_dir: "{d / "js"}"\n}}\n'
            f'mqtt {{\n  listen: "127.0.0.1:{self.mqtt_port}"\n'
            f'  ack_wait: "{ack_wait_s:g}s"\n  max_ack_pending: 1000\n}}\n')
        self.proc: subprocess.Popen | None = None

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.mqtt_port}"

    def log(self) -> str:
        try:
            return (self.dir / "nats.log").read_text(errors="replace")
        except OSError:
            return ""

    def start(self, timeout: float = 20.0) -> "Nats":
        require_nats()
        with open(self.dir / "nats.log", "ab") as logf:
            self.proc = subprocess.Popen([NATS_SERVER, "-c", str(self.dir / "nats.conf")],
                                         stdout=logf, stderr=subprocess.STDOUT)
        deadline = time.monotonic() + timeout
        while True:
            if self.proc.poll() is not None:
                raise RuntimeError(f"nats-server exited with {self.proc.returncode}:\n"
                                   f"{self.log()[-3000:]}")
            try:
                socket.create_connection(("127.0.0.1", self.mqtt_port), timeout=0.5).close()
                return self
            except OSError:
                if time.monotonic() > deadline:
                    self.stop()
                    raise RuntimeError("nats-server did not open its MQTT port:\n"
                                       + self.log()[-3000:]) from None
                time.sleep(0.05)

    def stop(self, timeout: float = 15.0) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
