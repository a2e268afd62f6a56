"""An in-process broker for the demo and fast tests: the broker path without a broker.

It keeps the parts of MQTT the service relies on, with the same semantics (MQTT 5.0):
persistent sessions per client identifier that queue QoS 1 messages while the client is away
(section 4.1), at most ``receive_maximum`` unacknowledged messages in flight (section 4.9),
redelivery of every unacknowledged message, in order, when the client connects again
(section 4.4), retained messages sent on subscribe (section 3.3.1.3), and a last will
published when a connection breaks without a clean disconnect (section 3.1.2.5). Topic
filters use paho-mqtt's matcher. Everything runs on one asyncio loop.
"""

from __future__ import annotations

import asyncio
import time
from collections import OrderedDict, deque
from typing import AsyncIterator, Callable

from paho.mqtt.client import topic_matches_sub

from .transport import Incoming, TransportError

_BROKEN = object()


class _Session:
    def __init__(self, client_id: str) -> None:
        self.client_id = client_id
        self.filters: dict[str, int] = {}
        self.queue: deque[tuple[str, bytes, int]] = deque()
        self.inflight: OrderedDict[int, tuple[str, bytes, int]] = OrderedDict()
        self.next_mid = 0
        self.receive_maximum = 65535
        self.transport: "InprocTransport | None" = None

    def _mid(self) -> int:
        while True:
            self.next_mid = self.next_mid % 65535 + 1
            if self.next_mid not in self.inflight:
                return self.next_mid

    def pump(self) -> None:
        t = self.transport
        while t is not None and self.queue:
            topic, payload, qos = self.queue[0]
            if qos > 0 and len(self.inflight) >= self.receive_maximum:
                return
            self.queue.popleft()
            mid = 0
            if qos > 0:
                mid = self._mid()
                self.inflight[mid] = (topic, payload, qos)
            t._deliver(topic, payload, qos, mid)

    def detach(self) -> None:
        """The connection is gone: unacknowledged messages go back to the front, in order."""
        self.transport = None
        self.queue.extendleft(reversed(list(self.inflight.values())))
        self.inflight.clear()


class InprocBroker:
    """Retained store, sessions and routing; ``publish`` is what a gateway would send."""

    def __init__(self, max_queued: int = 1_000_000) -> None:
        self.sessions: dict[str, _Session] = {}
        self.retained: dict[str, bytes] = {}
        self.max_queued = max_queued
        self.dropped = 0
        self.up = True
        self.published = 0

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> None:
        self.published += 1
        if retain:
            if payload:
                self.retained[topic] = payload
            else:
                self.retained.pop(topic, None)
        for s in self.sessions.values():
            q = max((sq for f, sq in s.filters.items() if topic_matches_sub(f, topic)),
                    default=None)
            if q is None:
                continue
            if len(s.queue) >= self.max_queued:
                self.dropped += 1
                continue
            s.queue.append((topic, payload, min(q, qos)))
            s.pump()

    def outage(self) -> None:
        """Drop every connection as a network failure would (wills are published)."""
        self.up = False
        for s in list(self.sessions.values()):
            if s.transport is not None:
                s.transport._broken("connection lost (in-process broker outage)")

    def restore(self) -> None:
        self.up = True

    def client(self, client_id: str, **kw) -> "InprocTransport":
        return InprocTransport(self, client_id, **kw)


class InprocTransport:
    """The service's side of :class:`InprocBroker` (same interface as the MQTT transport)."""

    def __init__(self, broker: InprocBroker, client_id: str, *, receive_maximum: int = 1000,
                 will: tuple[str, bytes] | None = None, clock: Callable[[], float] = time.time,
                 persistent: bool = True) -> None:
        self.broker = broker
        self.client_id = client_id
        self.receive_maximum = receive_maximum
        self.will = will
        self.clock = clock
        self.persistent = persistent
        self.generation = 0
        self.connected = False
        self._q: asyncio.Queue | None = None
        self._session: _Session | None = None

    async def connect(self) -> bool:
        await asyncio.sleep(0)
        if not self.broker.up:
            raise TransportError("in-process broker is down")
        b = self.broker
        present = self.persistent and self.client_id in b.sessions
        if not present:
            b.sessions[self.client_id] = _Session(self.client_id)
        s = b.sessions[self.client_id]
        if s.transport is not None:        # session take-over: the older connection ends
            s.transport._broken("session taken over")
        s.receive_maximum = self.receive_maximum
        self._q = asyncio.Queue()
        self.generation += 1
        self.connected = True
        self._session = s
        s.transport = self
        s.pump()
        return present

    async def subscribe(self, filters: list[str], qos: int = 1) -> None:
        s = self._session
        if s is None or not self.connected:
            raise TransportError("not connected")
        for f in filters:
            s.filters[f] = qos
        for topic, payload in list(self.broker.retained.items()):
            if any(topic_matches_sub(f, topic) for f in filters):
                s.queue.append((topic, payload, qos))
        s.pump()

    def _deliver(self, topic: str, payload: bytes, qos: int, mid: int) -> None:
        assert self._q is not None
        self._q.put_nowait(Incoming(topic, payload, qos, mid, self.generation, 0.0))

    def _broken(self, reason: str) -> None:
        if not self.connected:
            return
        self._end()
        if self._q is not None:
            self._q.put_nowait((_BROKEN, reason))
        if self.will is not None:
            self.broker.publish(self.will[0], self.will[1], 1, True)

    def _end(self) -> None:
        self.connected = False
        s = self._session
        if s is not None and s.transport is self:
            s.detach()
            if not self.persistent:
                self.broker.sessions.pop(self.client_id, None)

    async def messages(self) -> AsyncIterator[Incoming]:
        q = self._q
        assert q is not None
        while True:
            m = await q.get()
            if isinstance(m, tuple):
                raise TransportError(m[1])
            m.rx = self.clock()
            yield m

    def leftover(self) -> list[Incoming]:
        out = []
        q = self._q
        while q is not None and not q.empty():
            m = q.get_nowait()
            if isinstance(m, Incoming):
                m.rx = self.clock()
                out.append(m)
        return out

    def ack(self, generation: int, mid: int, qos: int) -> bool:
        if qos == 0:
            return True
        if generation != self.generation or not self.connected or self._session is None:
            return False
        s = self._session
        if s.inflight.pop(mid, None) is None:
            return False
        s.pump()
        return True

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False):
        if not self.connected:
            return None
        self.broker.publish(topic, payload, qos, retain)
        return True

    def published(self, handle) -> bool:
        return handle is True

    async def publish_wait(self, topic: str, payload: bytes, qos: int = 1,
                           retain: bool = False, timeout: float = 5.0) -> None:
        if self.publish(topic, payload, qos, retain) is None:
            raise TransportError("not connected")

    async def disconnect(self) -> None:
        """Clean disconnect: the will is not published."""
        self._end()

    async def drop(self) -> None:
        self.connected = False
