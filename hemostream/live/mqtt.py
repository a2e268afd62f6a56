"""The MQTT transport: aiomqtt (over paho-mqtt) with application-controlled acknowledgement.

Choices, each tied to the MQTT 5.0 specification (OASIS Standard, 7 March 2019):

- Protocol 5.0, a fixed client identifier, Clean Start 0 and a Session Expiry Interval
  (sections 3.1.2.4 and 3.1.2.11.2): the broker keeps the subscriptions and queues QoS 1
  messages while hemostream is away, and delivers them when it comes back.
- QoS 1 subscriptions (section 4.3.2): at-least-once; the PUBACK is what tells the broker it
  may forget a message. paho-mqtt's ``manual_ack`` withholds it until the service calls
  :meth:`MqttTransport.ack`, which it does only after the database committed the message.
  aiomqtt does not expose this yet (its open issue #345); the workaround shown there reaches
  the paho client as ``client._client`` - the only private attribute used, in this module only.
- Receive Maximum (section 3.1.2.11.3): at most that many unacknowledged QoS 1 messages are
  in flight to us, so a slow database pushes back on the broker instead of filling memory.
- Maximum Packet Size (section 3.1.2.11.4): larger packets are never sent to us (the broker
  discards them); anything below it but over the wire format's payload limit reaches the core
  and is stored as a reject.
- A retained last will (section 3.1.2.5) publishes "offline" if the connection dies.
- ``broker.protocol = "3.1.1"`` speaks MQTT 3.1.1 (OASIS Standard, 29 October 2014) for
  brokers without MQTT 5: Clean Session 0 (its section 3.1.2.4) keeps the session; the MQTT 5
  properties above are not sent (a note in the log says so) and the broker's settings apply.

All paho calls happen on the event loop thread (aiomqtt drives paho from the loop).
"""

from __future__ import annotations

import asyncio
import logging
import os
import ssl
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, AsyncIterator, Callable
from urllib.parse import urlsplit

import aiomqtt
from aiomqtt.exceptions import MqttConnectError
import paho.mqtt.client as paho
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from ..core.config import BrokerConfig
from .transport import Incoming, TransportError

log = logging.getLogger("hemostream.live.mqtt")

#: CONNACK reason codes that mean "you may not connect" (MQTT 5.0 section 3.2.2.2), and the
#: MQTT 3.1.1 return codes 4 and 5 as paho reports them
REFUSED = {0x85: "client identifier not valid", 0x86: "bad user name or password",
           0x87: "not authorized", 0x8A: "banned", 0x8C: "bad authentication method"}
PASSWORD_ENV_DEFAULT = "HEMOSTREAM_MQTT_PASSWORD"


_NOTED: set[str] = set()


def _note_v311(cfg: BrokerConfig) -> None:
    """Say once per process what MQTT 3.1.1 cannot ask of the broker."""
    if "v311" in _NOTED:
        return
    _NOTED.add("v311")
    log.info("MQTT 3.1.1 (broker.protocol): the session expiry (%d s), receive maximum (%d) "
             "and maximum packet size (%d bytes) are MQTT 5 features and are not sent; the "
             "broker's own settings for them apply, and a session taken over by another "
             "client is not reported as such", cfg.session_expiry_s, cfg.receive_maximum,
             cfg.max_packet_bytes)


class BrokerSettingsError(ValueError):
    """A broker URL or security setting that cannot work; the message says how to fix it."""


@dataclass(frozen=True)
class BrokerAddress:
    host: str
    port: int
    tls: bool
    username: str | None

    def __str__(self) -> str:  # never carries a password
        who = f"{self.username}@" if self.username else ""
        return f"{'mqtts' if self.tls else 'mqtt'}://{who}{self.host}:{self.port}"


def parse_broker_url(url: str) -> BrokerAddress:
    """``mqtt://host[:port]`` or ``mqtts://[user@]host[:port]``; a password in it is refused.

    >>> str(parse_broker_url("mqtts://hemostream@broker.sdu9.example:8884"))
    'mqtts://hemostream@broker.sdu9.example:8884'
    >>> parse_broker_url("mqtt://127.0.0.1").port
    1883
    """
    u = urlsplit(url)
    if u.scheme not in ("mqtt", "mqtts"):
        raise BrokerSettingsError(f"broker URL {url!r}: expected mqtt://host:port or "
                                  "mqtts://host:port")
    if u.password is not None:
        raise BrokerSettingsError(
            "broker URL: a password on the command line ends up in shell history and process "
            "lists; put it in an environment variable (broker.password_env) or a file "
            "(broker.password_file) instead")
    if not u.hostname:
        raise BrokerSettingsError(f"broker URL {url!r}: no host")
    tls = u.scheme == "mqtts"
    try:
        port = u.port or (8883 if tls else 1883)
    except ValueError:
        raise BrokerSettingsError(f"broker URL {url!r}: the port must be a number") from None
    return BrokerAddress(u.hostname, port, tls, u.username or None)


def read_password(cfg: BrokerConfig, username: str | None) -> str | None:
    """The password from ``password_env`` or ``password_file`` (never from the config or the
    command line); with a user name and neither set, from ``HEMOSTREAM_MQTT_PASSWORD``."""
    if cfg.password_env:
        value = os.environ.get(cfg.password_env)
        if value is None:
            raise BrokerSettingsError(f"broker.password_env names {cfg.password_env!r}, "
                                      "but that environment variable is not set")
        return value
    if cfg.password_file:
        try:
            return Path(cfg.password_file).read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as e:
            raise BrokerSettingsError(f"broker.password_file {cfg.password_file!r}: cannot "
                                      f"read it ({e.strerror or e})") from None
    if username:
        return os.environ.get(PASSWORD_ENV_DEFAULT)
    return None


def tls_context(cfg: BrokerConfig) -> ssl.SSLContext:
    """Server verification against ``ca_file`` (or the system's CAs), hostname checked,
    optional client certificate."""
    try:
        ctx = ssl.create_default_context(cafile=cfg.ca_file)
        if cfg.cert_file:
            ctx.load_cert_chain(cfg.cert_file, cfg.key_file)
    except (OSError, ssl.SSLError) as e:
        raise BrokerSettingsError(f"TLS files (ca_file={cfg.ca_file!r}, cert_file="
                                  f"{cfg.cert_file!r}, key_file={cfg.key_file!r}): {e}") from None
    return ctx


class MqttTransport:
    """One broker connection at a time, with a fresh aiomqtt client per connection."""

    def __init__(self, cfg: BrokerConfig, *, will: tuple[str, bytes] | None = None,
                 clock: Callable[[], float] = time.time, persistent: bool = True) -> None:
        self.cfg = cfg
        self.address = parse_broker_url(cfg.url)
        self.username = cfg.username or self.address.username
        self._password = read_password(cfg, self.username)
        if self.username is None and self._password is not None:
            raise BrokerSettingsError("a broker password is set but no broker.username")
        self._tls = tls_context(cfg) if (self.address.tls or cfg.ca_file) else None
        if cfg.cert_file and self._tls is None:
            raise BrokerSettingsError("broker.cert_file needs TLS: use an mqtts:// URL")
        self.will = will
        self.clock = clock
        self.persistent = persistent
        self.generation = 0
        self.connected = False
        self.session_present = False
        #: the last connection ended because another client took the session over
        self.taken_over = False
        self._client: aiomqtt.Client | None = None

    def __repr__(self) -> str:
        return f"MqttTransport({self.address}, client_id={self.cfg.client_id!r})"

    def _make_client(self) -> aiomqtt.Client:
        cfg = self.cfg
        will = None
        if self.will is not None:
            will = aiomqtt.Will(self.will[0], self.will[1], qos=1, retain=True)
        common: dict[str, Any] = dict(
            identifier=cfg.client_id, username=self.username, password=self._password,
            will=will, keepalive=cfg.keepalive_s, timeout=cfg.connect_timeout_s,
            tls_context=self._tls, max_inflight_messages=cfg.outgoing_inflight,
            max_queued_outgoing_messages=cfg.outgoing_queue,
            logger=logging.getLogger("hemostream.live.paho"))
        if cfg.protocol == "3.1.1":
            # MQTT 3.1.1 section 3.1.2.4: Clean Session 0 keeps the session with no expiry
            # the client can set; the broker's settings decide how long it lasts
            _note_v311(cfg)
            client = aiomqtt.Client(self.address.host, self.address.port,
                                    protocol=aiomqtt.ProtocolVersion.V311,
                                    clean_session=not self.persistent, **common)
        else:
            props = Properties(PacketTypes.CONNECT)
            if self.persistent:
                props.SessionExpiryInterval = cfg.session_expiry_s
            props.ReceiveMaximum = cfg.receive_maximum
            props.MaximumPacketSize = cfg.max_packet_bytes
            client = aiomqtt.Client(self.address.host, self.address.port,
                                    protocol=aiomqtt.ProtocolVersion.V5,
                                    clean_start=not self.persistent, properties=props,
                                    **common)
        inner: paho.Client = client._client          # aiomqtt issue #345 workaround
        inner.manual_ack_set(True)
        on_connect = inner.on_connect

        def _on_connect(c, userdata, flags, reason, properties=None):
            self.session_present = bool(getattr(flags, "session_present", False))
            on_connect(c, userdata, flags, reason, properties)

        inner.on_connect = _on_connect
        on_disconnect = inner.on_disconnect

        def _on_disconnect(c, userdata, flags, reason, properties=None):
            # MQTT 5 DISCONNECT reason 142 "Session taken over": another client connected
            # with this client id (section 3.14.2.1)
            self.taken_over = getattr(reason, "value", reason) == 142
            on_disconnect(c, userdata, flags, reason, properties)

        inner.on_disconnect = _on_disconnect
        return client

    async def connect(self) -> bool:
        client = self._make_client()
        try:
            await client.__aenter__()
        except MqttConnectError as e:
            rc = getattr(e, "rc", None)
            value = getattr(rc, "value", rc)
            if value in REFUSED:
                raise TransportError(f"{self.address} refused the connection: "
                                     f"{REFUSED[value]}", refused=True) from None
            raise TransportError(f"{self.address} refused the connection: {e}") from None
        except aiomqtt.MqttError as e:
            raise TransportError(f"cannot connect to {self.address}: {e}") from None
        self._client = client
        self.generation += 1
        self.connected = True
        return self.session_present

    async def subscribe(self, filters: list[str], qos: int = 1) -> None:
        assert self._client is not None
        try:
            result = await self._client.subscribe([(f, qos) for f in filters])
        except aiomqtt.MqttError as e:
            self.connected = False
            raise TransportError(f"subscribe failed: {e}") from None
        bad = [(f, str(rc)) for f, rc in zip(filters, result)
               if getattr(rc, "value", rc) not in (0, 1, 2)]
        if bad:
            raise TransportError("the broker refused the subscription(s) "
                                 + ", ".join(f"{f} ({rc})" for f, rc in bad), refused=True)

    async def messages(self) -> AsyncIterator[Incoming]:
        client = self._client
        assert client is not None
        gen = self.generation
        clock = self.clock
        try:
            async for m in client.messages:
                yield Incoming(m.topic.value, m.payload if isinstance(m.payload, bytes)
                               else bytes(str(m.payload), "utf-8"), m.qos, m.mid, gen, clock(),
                               bool(m.retain))
        except aiomqtt.MqttError as e:
            self.connected = False
            raise TransportError(f"connection to {self.address} lost: {e}") from None

    def leftover(self) -> list[Incoming]:
        """What the broken client had received but not handed out (never acknowledged: the
        broker will send it again; processing it now keeps the store current meanwhile)."""
        client = self._client
        out: list[Incoming] = []
        q = getattr(client, "_queue", None)
        while q is not None and not q.empty():
            m = q.get_nowait()
            out.append(Incoming(m.topic.value, m.payload, m.qos, m.mid,
                                self.generation, self.clock(), bool(m.retain)))
        return out

    def ack(self, generation: int, mid: int, qos: int) -> bool:
        if qos == 0:
            return True
        if generation != self.generation or not self.connected or self._client is None:
            return False
        return self._client._client.ack(mid, qos) == paho.MQTT_ERR_SUCCESS

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False):
        if not self.connected or self._client is None:
            return None
        info = self._client._client.publish(topic, payload, qos, retain)
        if info.rc != paho.MQTT_ERR_SUCCESS:
            return None
        return info

    def published(self, handle) -> bool:
        try:
            return bool(handle.is_published())
        except (ValueError, RuntimeError):
            return False

    async def publish_wait(self, topic: str, payload: bytes, qos: int = 1,
                           retain: bool = False, timeout: float = 5.0) -> None:
        if self._client is None or not self.connected:
            raise TransportError("not connected")
        try:
            await self._client.publish(topic, payload, qos, retain, timeout=timeout)
        except aiomqtt.MqttError as e:
            raise TransportError(f"publish to {topic} failed: {e}") from None

    async def disconnect(self) -> None:
        client, self._client = self._client, None
        self.connected = False
        if client is None:
            return
        try:
            await asyncio.wait_for(client.__aexit__(None, None, None), 10)
        except (aiomqtt.MqttError, asyncio.TimeoutError) as e:
            log.debug("disconnect: %s", e)

    async def drop(self) -> None:
        """Forget a broken connection (no DISCONNECT packet: the will stays armed)."""
        client, self._client = self._client, None
        self.connected = False
        if client is not None:
            try:
                await asyncio.wait_for(client.__aexit__(None, None, None), 2)
            except (aiomqtt.MqttError, asyncio.TimeoutError, Exception) as e:  # noqa: BLE001
                log.debug("dropping a broken connection: %s", e)
