"""What the live service needs from a message transport (a real broker or the in-process one).

The service never touches a client library directly: it connects, subscribes, iterates
incoming messages, acknowledges each one once it is stored, and publishes. Every incoming
message carries the *connection generation* it arrived on, because an MQTT packet identifier
is only meaningful on the connection that delivered it: after a reconnect the broker resends
every unacknowledged message with its original identifier (MQTT 5.0 section 4.4, MQTT 3.1.1
section 4.4), so an acknowledgement left over from an older connection is dropped instead of
sent, and the redelivered copy is acknowledged when its (duplicate-dropped) batch commits.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import AsyncIterator, Protocol


class TransportError(Exception):
    """The connection failed or broke; ``refused`` says the broker said no (credentials)."""

    def __init__(self, message: str, *, refused: bool = False) -> None:
        super().__init__(message)
        self.refused = refused


@dataclass(slots=True)
class Incoming:
    topic: str
    payload: bytes
    qos: int
    mid: int
    generation: int
    rx: float = 0.0
    #: the broker's retained copy (sent again on every subscribe)
    retain: bool = False


class Transport(Protocol):
    """One client connection at a time; ``connect`` again after a :class:`TransportError`."""

    generation: int
    connected: bool

    async def connect(self) -> bool:
        """Open a connection; True when the broker still had our session."""

    async def subscribe(self, filters: list[str], qos: int = 1) -> None: ...

    def messages(self) -> AsyncIterator[Incoming]:
        """Messages of the current connection; raises TransportError when it breaks."""

    def leftover(self) -> list[Incoming]:
        """Messages received on a broken connection but not yet handed out."""

    def ack(self, generation: int, mid: int, qos: int) -> bool:
        """Acknowledge one message of connection ``generation``; False if that is gone."""

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> object:
        """Queue a message without waiting; returns a handle for :meth:`published`, or None
        when it could not be queued."""

    def published(self, handle: object) -> bool: ...

    async def publish_wait(self, topic: str, payload: bytes, qos: int = 1,
                           retain: bool = False, timeout: float = 5.0) -> None: ...

    async def disconnect(self) -> None: ...
