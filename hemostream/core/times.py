"""Times of the core: epoch seconds UTC (floats) in, RFC 3339 text out."""

from __future__ import annotations

import math
from datetime import datetime, timezone
from typing import Any

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def epoch(t: datetime) -> float:
    """Seconds since 1970-01-01T00:00:00Z of an aware datetime (exact to the microsecond)."""
    d = t - _EPOCH
    return d.days * 86400.0 + d.seconds + d.microseconds / 1e6


def arrival_epoch(rx: Any) -> float | None:
    """Epoch seconds of an arrival time given as epoch seconds or an aware datetime, or None
    for anything else (naive datetimes, text, bools, NaN or infinite numbers).

    >>> arrival_epoch(1), arrival_epoch(datetime(1970, 1, 1, 0, 1, tzinfo=timezone.utc))
    (1.0, 60.0)
    >>> arrival_epoch(datetime(1970, 1, 1)) is None, arrival_epoch("now") is None
    (True, True)
    """
    if isinstance(rx, float):
        return rx if math.isfinite(rx) else None
    if isinstance(rx, int) and not isinstance(rx, bool):
        return float(rx)
    if isinstance(rx, datetime):
        return epoch(rx) if rx.utcoffset() is not None else None
    return None


def iso(t: float) -> str:
    """RFC 3339 UTC text, millisecond precision, for epoch seconds."""
    return datetime.fromtimestamp(t, timezone.utc).isoformat(
        timespec="milliseconds").replace("+00:00", "Z")
