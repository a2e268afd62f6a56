"""RFC 3339 time text: the one policy for every time on the wire and on the command line.

Light on purpose (standard library and numpy only, numpy imported when a batch is
formatted): the ``query`` command formats every row's time and imports nothing else of the
wire format. :mod:`.wire` re-exports these functions.
"""

from __future__ import annotations

import math
from datetime import datetime, timezone
from typing import Any, Sequence

# --------------------------------------------------------------------------- times
#
# One policy for every time on the wire and on the command line (docs/wire-format.md): RFC
# 3339 text with an explicit offset (``Z`` or ``+hh:mm``). A time without an offset is
# rejected (ValueError with a reason), never guessed as local time or UTC. Times inside
# hemostream are epoch seconds (float, UTC); text goes out in UTC with milliseconds and ``Z``.

_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def epoch(t: datetime) -> float:
    """Seconds since 1970-01-01T00:00:00Z of an aware datetime (exact to the microsecond).

    >>> epoch(datetime(2026, 12, 1, 8, 0, tzinfo=timezone.utc))
    1796112000.0
    """
    if t.tzinfo is None:
        raise ValueError(f"time {t.isoformat()!r} has no UTC offset")
    d = t - _EPOCH
    return d.days * 86400.0 + d.seconds + d.microseconds / 1e6


def parse_time(text: Any, what: str = "time") -> float:
    """Epoch seconds of RFC 3339 text with an offset; ValueError naming ``what`` otherwise.

    >>> parse_time("2026-12-01T09:00:00+01:00")
    1796112000.0
    >>> parse_time("2026-12-01T08:00:00")
    Traceback (most recent call last):
    ...
    ValueError: time '2026-12-01T08:00:00' has no UTC offset: give Z or +hh:mm, e.g. 2026-12-01T08:00:00Z
    """
    if not isinstance(text, str):
        raise ValueError(f"{what} must be an RFC 3339 timestamp string such as "
                         "2026-12-01T08:15:00Z")
    try:
        t = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"{what} {text[:64]!r}: expected an RFC 3339 time such as "
                         "2026-12-01T08:00:00Z") from None
    if t.tzinfo is None:
        raise ValueError(f"{what} {text[:64]!r} has no UTC offset: give Z or +hh:mm, e.g. "
                         "2026-12-01T08:00:00Z")
    try:
        return epoch(t)
    except OverflowError:           # year 1 with a positive offset is before year 1 in UTC
        raise ValueError(f"{what} {text[:64]!r} is out of range") from None


def parse_time_or_none(text: Any) -> float | None:
    """:func:`parse_time`, or None for anything that is not a valid wire time."""
    try:
        return parse_time(text)
    except (ValueError, OverflowError):
        return None


def format_epoch(t: float) -> str:
    """RFC 3339 UTC text, millisecond precision, for epoch seconds.

    >>> format_epoch(1796112000.25)
    '2026-12-01T08:00:00.250Z'
    """
    # datetime.fromtimestamp's own rounding (to the microsecond, half to even), then the
    # milliseconds cut as isoformat cuts them; the whole-second text is cached (a feed
    # formats the same second many times), so this is a dictionary look-up and an f-string
    frac, whole = math.modf(t)
    us = round(frac * 1e6)
    if us >= 1_000_000:
        whole, us = whole + 1, us - 1_000_000
    elif us < 0:
        whole, us = whole - 1, us + 1_000_000
    sec = int(whole)
    head = _SECONDS.get(sec)
    if head is None:
        if len(_SECONDS) >= 8192:
            _SECONDS.clear()
        head = _SECONDS[sec] = datetime.fromtimestamp(sec, timezone.utc).replace(
            tzinfo=None).isoformat(timespec="seconds")
    return f"{head}.{us // 1000:03d}Z"


_SECONDS: dict[int, str] = {}


#: epoch seconds of 1000-01-01 and 10000-01-01: inside, every time's text has a 4-digit year
_BATCH_MIN, _BATCH_MAX = -30610224000.0, 253402300800.0


def format_epochs(times: Sequence[float], suffix: str = "Z") -> list[str]:
    """:func:`format_epoch` of many times at once, byte for byte the same text (numpy's
    datetime text instead of a ``datetime`` per time); ``suffix`` "" leaves the ``Z`` off
    for a caller that writes it itself.

    The millisecond is found as ``datetime.fromtimestamp`` finds it: the fraction of the
    second (``modf``) times 10^6, rounded half to even to the microsecond, then cut to the
    millisecond (``isoformat(timespec="milliseconds")`` truncates).

    >>> format_epochs([1796112000.25, 1796112000.0009995, -0.0005])
    ['2026-12-01T08:00:00.250Z', '2026-12-01T08:00:00.000Z', '1969-12-31T23:59:59.999Z']
    """
    import numpy as np

    t = np.asarray(times, dtype=np.float64)
    if len(t) == 0:
        return []
    if not (np.isfinite(t).all() and t.min() >= _BATCH_MIN and t.max() < _BATCH_MAX):
        # odd times (NaN, years outside 1000-9999): one at a time, errors as before
        return [format_epoch(x)[:-1] + suffix for x in times]
    frac, whole = np.modf(t)
    us = np.rint(frac * 1e6)                   # IEEE round to nearest, ties to even
    up, down = us >= 1e6, us < 0
    us[up] -= 1e6
    whole[up] += 1.0
    us[down] += 1e6
    whole[down] -= 1.0
    ms = whole.astype(np.int64) * 1000 + us.astype(np.int64) // 1000
    text = np.datetime_as_string(ms.astype("datetime64[ms]"), unit="ms").tolist()
    if suffix:
        return [s + suffix for s in text]
    return text
