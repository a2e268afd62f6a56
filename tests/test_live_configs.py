"""The shipped broker configurations (configs/mosquitto/) start a real Mosquitto and do what
their comments say. Paths and ports are moved to a temporary directory; nothing else changes.
"""

from __future__ import annotations

import asyncio
import getpass
import shutil
import tempfile
import os
import re
import subprocess
import time
from pathlib import Path

import pytest

from hemostream.core.config import BrokerConfig
from hemostream.live.mqtt import MqttTransport
from hemostream.live.transport import TransportError

from live_fixtures import ROOT, broker, wait_until  # noqa: F401
from mosquitto import MOSQUITTO, MOSQUITTO_PASSWD, free_ports, make_certificates, require_broker

pytestmark = pytest.mark.broker
SHIPPED = ROOT / "configs" / "mosquitto"


def _start(conf: Path, port: int, cwd: Path) -> subprocess.Popen:
    p = subprocess.Popen([MOSQUITTO, "-c", str(conf)], cwd=cwd, stdout=subprocess.DEVNULL,
                         stderr=subprocess.PIPE)
    import socket

    def up() -> bool:
        if p.poll() is not None:
            raise AssertionError(f"mosquitto refused {conf.name}: {p.stderr.read().decode()}")
        try:
            socket.create_connection(("127.0.0.1", port), 0.3).close()
            return True
        except OSError:
            return False
    wait_until(up, 15, f"mosquitto with {conf.name}")
    return p


def _stop(p: subprocess.Popen) -> None:
    p.terminate()
    p.wait(15)
    if p.stderr:
        p.stderr.close()


def _try(cfg: BrokerConfig) -> None:
    async def go():
        t = MqttTransport(cfg, persistent=False)
        await t.connect()
        await t.disconnect()
    asyncio.run(go())


def test_dev_config(tmp_path):
    require_broker()
    port, = free_ports(1)
    text = (SHIPPED / "dev.conf").read_text()
    text = text.replace("listener 1883 127.0.0.1", f"listener {port} 127.0.0.1")
    shipped = re.search(r"^persistence_location (\S+)$", text, re.M).group(1)
    # a directory the broker's user can reach (pytest's own tmp root is private to root)
    data = Path(tempfile.mkdtemp(prefix="hs-dev-broker-", dir="/tmp"))
    os.chmod(data, 0o755)
    if os.geteuid() == 0:
        # started as root, Mosquitto runs as the user "mosquitto": the shipped directory must
        # be that user's (the Debian package's), and so is the stand-in here
        import pwd
        owner = pwd.getpwnam("mosquitto")
        if Path(shipped).is_dir():
            assert Path(shipped).stat().st_uid == owner.pw_uid, shipped
        os.chown(data, owner.pw_uid, owner.pw_gid)
    text = text.replace(f"persistence_location {shipped}", f"persistence_location {data}/")
    conf = tmp_path / "dev.conf"
    conf.write_text(text)                                # as started: no "user" line added
    p = _start(conf, port, tmp_path)
    try:
        _try(BrokerConfig(url=f"mqtt://127.0.0.1:{port}", client_id="dev-check"))
    finally:
        _stop(p)
    try:
        assert (data / "mosquitto.db").exists()          # the session survives a restart
    finally:
        shutil.rmtree(data, ignore_errors=True)


def test_one_packet_limit():
    """The broker's packet limit is hemostream's: nothing the broker accepts is too large for
    the service (the service advertises its limit in CONNECT; the broker drops, silently,
    what exceeds it)."""
    want = BrokerConfig().max_packet_bytes
    for name in ("dev.conf", "secure.conf"):
        found = re.findall(r"^max_packet_size (\d+)$", (SHIPPED / name).read_text(), re.M)
        assert found == [str(want)], name


def test_secure_config_with_the_shipped_acl(tmp_path, monkeypatch):
    require_broker()
    port, = free_ports(1)
    certs = tmp_path / "certs"
    certs.mkdir()
    make_certificates(certs)
    pw = tmp_path / "passwd"
    pw.write_text("")
    users = {"hemostream": "s-1", "gw-sdu4-bed-01": "g-1"}
    for u, w in users.items():
        subprocess.run([MOSQUITTO_PASSWD, "-b", str(pw), u, w], check=True)
    (tmp_path / "data").mkdir()
    text = (SHIPPED / "secure.conf").read_text()
    text = (text.replace("/etc/mosquitto/certs/", f"{certs}/")
                .replace("/etc/mosquitto/passwd", str(pw))
                .replace("/etc/mosquitto/hemostream.acl", str(SHIPPED / "hemostream.acl"))
                .replace("/var/lib/mosquitto/", f"{tmp_path}/data/"))
    text = re.sub(r"^listener 8883$", f"listener {port} 127.0.0.1", text, flags=re.M)
    assert "/etc/" not in re.sub(r"#.*", "", text)
    conf = tmp_path / "secure.conf"
    conf.write_text(f"user {getpass.getuser()}\n" + text)
    p = _start(conf, port, tmp_path)
    url = f"mqtts://127.0.0.1:{port}"
    ca = str(certs / "ca.crt")
    try:
        with pytest.raises(TransportError) as e:                 # anonymous: no
            _try(BrokerConfig(url=url, client_id="a", ca_file=ca))
        assert e.value.refused
        monkeypatch.setenv("T_S", users["hemostream"])
        monkeypatch.setenv("T_G", users["gw-sdu4-bed-01"])
        _try(BrokerConfig(url=url, client_id="s", username="hemostream", password_env="T_S",
                          ca_file=ca))

        async def acl() -> list[str]:
            svc = MqttTransport(BrokerConfig(url=url, client_id="svc", username="hemostream",
                                             password_env="T_S", ca_file=ca),
                                persistent=False)
            gw = MqttTransport(BrokerConfig(url=url, client_id="gw", username="gw-sdu4-bed-01",
                                            password_env="T_G", ca_file=ca), persistent=False)
            await svc.connect()
            await svc.subscribe(["hemo/SDU4/+/obs"], 0)
            await gw.connect()
            await gw.publish_wait("hemo/SDU4/bed-02/obs", b"forged", 1)
            await gw.publish_wait("hemo/SDU4/bed-01/obs", b"own", 1)
            got = []
            end = time.monotonic() + 3
            async for m in svc.messages():
                got.append(m.topic)
                if m.payload == b"own" or time.monotonic() > end:
                    break
            await gw.disconnect()
            await svc.disconnect()
            return got

        assert asyncio.run(acl()) == ["hemo/SDU4/bed-01/obs"]

        async def takeover() -> list[bytes]:
            # a gateway that knows the service's client id connects with it: its id is its
            # user name (use_username_as_clientid), so the service's session stays up
            svc = MqttTransport(BrokerConfig(url=url, client_id="hemostream-sdu4",
                                             username="hemostream", password_env="T_S",
                                             ca_file=ca), persistent=False)
            gw = MqttTransport(BrokerConfig(url=url, client_id="hemostream-sdu4",
                                            username="gw-sdu4-bed-01", password_env="T_G",
                                            ca_file=ca), persistent=False)
            await svc.connect()
            await svc.subscribe(["hemo/SDU4/+/obs"], 1)
            await gw.connect()
            await asyncio.sleep(0.5)
            await gw.publish_wait("hemo/SDU4/bed-01/obs", b"after", 1)
            got = []
            async def read():
                async for m in svc.messages():
                    got.append(m.payload)
                    return
            await asyncio.wait_for(read(), 5)
            await gw.disconnect()
            await svc.disconnect()
            return got

        assert asyncio.run(takeover()) == [b"after"]
    finally:
        _stop(p)


def test_a_session_takeover_is_reported(broker, tmp_path):  # noqa: F811
    """Without the broker binding client ids to users (dev.conf), a client connecting with
    the service's client id takes its session over. The service reconnects and says so in
    its log and in health, loudly once it keeps happening."""
    import logging

    import paho.mqtt.client as paho
    from live_fixtures import ServiceThread, live_config, mqtt_transport

    cfg = live_config(broker.url(), f"sqlite:///{tmp_path / 't.db'}", "hs-takeover")
    records: list[logging.LogRecord] = []

    class Keep(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            records.append(record)

    h = Keep(level=logging.ERROR)
    logging.getLogger("hemostream.live").addHandler(h)
    svc = ServiceThread(cfg, mqtt_transport(cfg)).start()
    try:
        for _ in range(3):
            c = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="hs-takeover",
                            protocol=paho.MQTTv5)
            c.connect("127.0.0.1", broker.ports["anon"])
            c.loop_start()
            time.sleep(0.5)
            c.disconnect()
            c.loop_stop()
            wait_until(lambda: svc.svc.t.connected, 15, "the service reconnected")
        wait_until(lambda: any(r.levelno == logging.CRITICAL for r in records), 15,
                   "a critical log line about repeated takeovers")
        assert any("taken its session over" in r.getMessage() or "took its session over" in r.getMessage() for r in records)
        assert svc.svc.publish_health()["broker"]["takeovers_10min"] >= 3
    finally:
        logging.getLogger("hemostream.live").removeHandler(h)
        svc.stop()
