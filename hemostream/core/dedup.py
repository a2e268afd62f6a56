"""Duplicate detection: recent message identities per device, bounded in memory."""

from __future__ import annotations

import hashlib
from collections import deque
from typing import Any


def raw_digest(raw: bytes | str) -> str:
    """A short content digest of raw input (to know a retained reject when it comes again)."""
    b = raw.encode("utf-8", "surrogateescape") if isinstance(raw, str) else bytes(raw)
    return hashlib.sha1(b).hexdigest()[:16]


def obs_identity(seq: int, t: float) -> int:
    """(seq, time) of an obs message as one exact integer: seq above, the time in whole
    microseconds below (2^52 us reach past the year 2100). An int takes about a third of the
    memory of a (seq, time) tuple, and thousands of devices x hundreds of identities add up.

    >>> obs_identity(1, 0.000001) == (1 << 52) + 1
    True
    """
    return (seq << 52) + round(t * 1e6)


class Dedup:
    """Recent message identities per device, bounded (at-least-once redeliveries are recent)."""

    def __init__(self, per_device: int) -> None:
        self.per_device = per_device
        self.seen: dict[str, tuple[set, deque]] = {}

    def check_and_add(self, device: str, ident: Any) -> bool:
        """True when ``ident`` was already seen for ``device``; remembers it otherwise."""
        entry = self.seen.get(device)
        if entry is None:
            entry = self.seen[device] = (set(), deque())
        s, q = entry
        if ident in s:
            return True
        s.add(ident)
        q.append(ident)
        if len(q) > self.per_device:
            s.discard(q.popleft())
        return False
