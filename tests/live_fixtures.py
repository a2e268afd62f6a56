"""Fixtures and helpers for the live tests (imported by tests/test_live_*.py).

Everything is real: a Mosquitto process per test session (tests/mosquitto.py), SQLite files,
TCP on 127.0.0.1. The wards here are invented (unit "SDU9", beds bed-01..bed-NN, gateways
gw-sdu9-bed-NN) and the values are made-up but plausible numbers, not physiology.
"""

from __future__ import annotations

import asyncio
import json
import os
import sqlite3
import subprocess
import sys
import threading
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import pytest

from hemostream.core.config import Config, UnitConfig
from hemostream.core.processor import iso
from hemostream.live.service import Service

from mosquitto import USERS, Mosquitto, require_broker

ROOT = Path(__file__).resolve().parent.parent
PY = sys.executable
UNIT = "SDU9"


# --------------------------------------------------------------------------- brokers

@pytest.fixture(scope="session")
def broker(tmp_path_factory):
    """One Mosquitto for the session (tests that restart a broker use ``own_broker``)."""
    require_broker()
    b = Mosquitto(tmp_path_factory.mktemp("mosquitto")).start()
    yield b
    b.stop()


@pytest.fixture
def own_broker(tmp_path):
    require_broker()
    b = Mosquitto(tmp_path / "mosquitto").start()
    yield b
    b.stop()


# --------------------------------------------------------------------------- data

def obs_lines(n: int, beds: int = 3, start: float | None = None, step_s: float = 0.01,
              unit: str = UNIT, seq0: int = 0, device_prefix: str = "gw-sdu9") -> list[dict]:
    """``n`` observation messages over ``beds`` beds, arriving ``step_s`` apart (recording
    lines: rx, topic, payload). Each (device, seq, time) is distinct."""
    t0 = time.time() if start is None else start
    out = []
    for i in range(n):
        bed = i % beds + 1
        t = t0 + i * step_s
        k = i // beds
        payload = {"v": 1, "device": f"{device_prefix}-bed-{bed:02d}", "seq": seq0 + k,
                   "time": iso(t), "obs": [
                       {"param": "HR", "value": 70 + (k % 20), "unit": "/min"},
                       {"param": "ABP_SYS", "value": 118 + (k % 9), "unit": "mm[Hg]"},
                       {"param": "ABP_DIA", "value": 64 + (k % 7), "unit": "mm[Hg]"},
                       {"param": "CVP", "value": 9 + (k % 3), "unit": "cm[H2O]"},
                       {"param": "CO", "value": 4.8 + (k % 5) / 10, "unit": "L/min"},
                       {"param": "SPO2", "value": 96 + (k % 3), "unit": "%"}]}
        out.append({"rx": iso(t), "topic": f"hemo/{unit}/bed-{bed:02d}/obs",
                    "payload": payload})
    return out


# --------------------------------------------------------------------------- config

def live_config(url: str, db_url: str, client_id: str, *, beds: int = 3,
                **broker: object) -> Config:
    cfg = Config(instance=client_id, units=[UnitConfig(
        id=UNIT, beds=[f"bed-{i:02d}" for i in range(1, beds + 1)])])
    b = cfg.broker.model_copy(update={"url": url, "client_id": client_id,
                                      "health_every_s": 0.5, "reconnect_min_s": 0.1,
                                      "reconnect_max_s": 1.0, **broker})
    st = cfg.store.model_copy(update={"url": db_url})
    return cfg.model_copy(update={"broker": b, "store": st})


def write_toml(path: Path, url: str, db_url: str, client_id: str, *, beds: int = 3,
               broker_extra: str = "") -> Path:
    bed_list = ", ".join(f'"bed-{i:02d}"' for i in range(1, beds + 1))
    path.write_text(
        f'instance = "{client_id}"\n\n[[units]]\nid = "{UNIT}"\nbeds = [{bed_list}]\n\n'
        f'[store]\nurl = "{db_url}"\n\n[broker]\nurl = "{url}"\nclient_id = "{client_id}"\n'
        'health_every_s = 0.5\nreconnect_min_s = 0.1\nreconnect_max_s = 1.0\n'
        + broker_extra)
    return path


# --------------------------------------------------------------------------- database

def db_path(db_url: str) -> str:
    return db_url[len("sqlite:///"):]


def query(db_url: str, sql: str, *args) -> list[tuple]:
    p = db_path(db_url)
    if not os.path.exists(p):
        return []
    con = sqlite3.connect(p, timeout=10)
    try:
        return con.execute(sql, args).fetchall()
    except sqlite3.OperationalError:     # tables not created yet
        return []
    finally:
        con.close()


def stored_messages(db_url: str) -> int:
    r = query(db_url, "SELECT count(*) FROM messages")
    return r[0][0] if r else 0


def repeated_identities(db_url: str) -> list[tuple]:
    """Messages stored more than once (same device, seq, time): must always be empty."""
    return query(db_url, "SELECT device, seq, time, count(*) FROM messages WHERE kind='obs' "
                         "GROUP BY device, seq, time HAVING count(*) > 1")


def wait_until(pred: Callable[[], bool], timeout: float, what: str,
               interval: float = 0.05) -> None:
    deadline = time.monotonic() + timeout
    while not pred():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        time.sleep(interval)


# --------------------------------------------------------------------------- the service

class ServiceThread:
    """The live service on its own event loop in a thread (as ``hemostream run`` runs it)."""

    def __init__(self, cfg: Config, make_transport: Callable[[], object],
                 **service_kw) -> None:
        self.cfg = cfg
        self.make_transport = make_transport
        self.kw = service_kw
        self.svc: Service | None = None
        self.code: int | None = None
        self.error: BaseException | None = None
        self._ready = threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True, name="service")

    def _run(self) -> None:
        async def main() -> int:
            self.loop = asyncio.get_running_loop()
            self.svc = Service(self.cfg, self.make_transport(), **self.kw)

            async def ready() -> None:
                await self.svc.ready.wait()
                self._ready.set()

            r = asyncio.create_task(ready())
            try:
                return await self.svc.run()
            finally:
                r.cancel()
                self._ready.set()

        try:
            self.code = asyncio.run(main())
        except BaseException as e:  # noqa: BLE001 - reported by stop()
            self.error = e
            self._ready.set()

    def start(self, timeout: float = 20) -> "ServiceThread":
        self._t.start()
        assert self._ready.wait(timeout), "service did not subscribe in time"
        if self.error is not None:
            raise self.error
        return self

    def stop(self, timeout: float = 30) -> int | None:
        if self._t.is_alive() and self.svc is not None:
            self.loop.call_soon_threadsafe(self.svc.stop)
        self._t.join(timeout)
        assert not self._t.is_alive(), "service did not stop"
        if self.error is not None:
            raise self.error
        return self.code


def mqtt_transport(cfg: Config, **kw):
    from hemostream.live.health import status_payload
    from hemostream.live.mqtt import MqttTransport
    from hemostream.live.service import status_topic
    will = (status_topic(cfg), status_payload(cfg.instance, "offline", None,
                                              reason="connection lost"))
    return lambda: MqttTransport(cfg.broker, will=will, **kw)


def publish(lines: list[dict], url: str, speed: float | None = None, **kw):
    from hemostream.live.publish import publish_recording_lines
    return asyncio.run(publish_recording_lines(lines, url, speed, **kw))


class Subscriber:
    """A plain paho client (threaded loop) that records what arrives on some filters."""

    def __init__(self, port: int, filters: list[str], user: str | None = None) -> None:
        import paho.mqtt.client as paho
        self.got: list[tuple[str, bytes, bool]] = []
        self.lock = threading.Lock()
        c = paho.Client(paho.CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
        if user:
            c.username_pw_set(user, USERS[user])
        subscribed = threading.Event()
        c.on_connect = lambda cl, u, f, rc, p=None: cl.subscribe([(f_, 1) for f_ in filters])
        c.on_subscribe = lambda *a: subscribed.set()
        c.on_message = self._on_message
        c.connect("127.0.0.1", port)
        c.loop_start()
        self.client = c
        assert subscribed.wait(10), "test subscriber could not subscribe"

    def _on_message(self, client, userdata, m) -> None:
        with self.lock:
            self.got.append((m.topic, m.payload, bool(m.retain)))

    def payloads(self, suffix: str) -> list[dict]:
        with self.lock:
            items = [(t, p) for t, p, _ in self.got if t.endswith(suffix)]
        out = []
        for _, p in items:
            try:
                out.append(json.loads(p))
            except ValueError:
                pass
        return out

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def run_cli_process(args: list[str], env_extra: dict | None = None,
                    log_path: Path | None = None) -> subprocess.Popen:
    """``hemostream ARGS`` in a child process (stderr to ``log_path``)."""
    env = dict(os.environ)
    env.pop("HEMOSTREAM_MQTT_PASSWORD", None)
    env.update(env_extra or {})
    err = open(log_path, "wb") if log_path else subprocess.DEVNULL
    return subprocess.Popen([PY, "-m", "hemostream.cli", *args], cwd=ROOT, env=env,
                            stdout=subprocess.DEVNULL, stderr=err)
