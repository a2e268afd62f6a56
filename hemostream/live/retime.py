"""Recording lines moved in time: to the present (a live hemostream rejects measurement times
far from its own clock), compressed for a faster replay, and with long silences shortened
(for the demo). Pure functions of the lines; :mod:`.publish` sends them."""

from __future__ import annotations

from typing import Any, Callable, Iterable, Iterator

from ..core.wire import format_epoch, parse_time, parse_time_or_none


class Retimer:
    """Moves a recording's times to the present.

    Real time (``speed`` 1) shifts every time by one offset, so the first arrival becomes
    ``start``. Faster than real time compresses the time line by ``speed`` around the first
    arrival, so measurement times keep pace with a receiver that uses its wall clock.

    >>> r = Retimer(start=1000.0, speed=2.0)
    >>> r.time(50.0), r.time(60.0)
    (1000.0, 1005.0)
    """

    def __init__(self, start: float, speed: float = 1.0) -> None:
        self.start = start
        self.speed = speed
        self.t0: float | None = None

    def time(self, t: float) -> float:
        if self.t0 is None:
            self.t0 = t
        return self.start + (t - self.t0) / self.speed

    def record(self, rec: dict) -> dict:
        """A retimed copy of a recording line (see :func:`map_times`)."""
        return map_times(rec, self.time)


def map_times(rec: dict, fn: Callable[[float], float]) -> dict:
    """A copy of a recording line with ``rx``, the payload's ``time`` and each observation's
    own ``time`` passed through ``fn`` (epoch seconds). Broken payloads pass unchanged."""

    def text(v: Any) -> Any:
        if not isinstance(v, str):
            return v
        try:
            return format_epoch(fn(parse_time(v)))
        except ValueError:
            return v

    out = dict(rec)
    if isinstance(rec.get("rx"), str):
        out["rx"] = text(rec["rx"])
    p = rec.get("payload")
    if isinstance(p, dict):
        p = dict(p)
        if "time" in p:
            p["time"] = text(p["time"])
        if isinstance(p.get("obs"), list):
            p["obs"] = [dict(o, time=text(o["time"])) if isinstance(o, dict) and "time" in o
                        else o for o in p["obs"]]
        out["payload"] = p
    return out


def close_gaps(recs: Iterable[dict], max_gap_s: float = 5.0,
               keep_s: float = 1.0) -> Iterator[dict]:
    """Shorten every silence longer than ``max_gap_s`` between arrivals to ``keep_s``, moving
    all later times (arrival and measurement) back by the same amount, so a demo does not sit
    idle through a recording's quiet stretches.

    >>> recs = [{"rx": "2026-12-01T08:00:00Z"}, {"rx": "2026-12-01T08:05:00Z"}]
    >>> [r["rx"] for r in close_gaps(recs)]
    ['2026-12-01T08:00:00Z', '2026-12-01T08:00:01.000Z']
    """
    prev: float | None = None
    shift = 0.0

    def back(x: float) -> float:
        return x - shift
    for rec in recs:
        rx = rec.get("rx")
        if isinstance(rx, str):
            t = parse_time_or_none(rx)
            if t is not None:
                if prev is not None and t - prev > max_gap_s:
                    shift += t - prev - keep_s
                prev = t
        yield map_times(rec, back) if shift else rec     # the shift as it is now
