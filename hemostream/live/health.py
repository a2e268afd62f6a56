"""Health figures of the live service: counted as it runs, published and logged periodically.

The payloads on ``hemo/_svc/<instance>/status`` (documented in docs/live.md):

* ``{"v":1,"kind":"status","state":"online"|"offline",...}``, retained (the broker keeps the
  latest for new subscribers); the last will is an ``offline`` one with ``"reason":
  "connection lost"``.
* ``{"v":1,"kind":"health",...}`` every ``broker.health_every_s`` seconds, not retained.
"""

from __future__ import annotations

import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

from ..core.wire import encode, format_epoch, status_body


def status_payload(instance: str, state: str, now: float | None, **extra: Any) -> bytes:
    """The encoded service status message (:func:`hemostream.core.wire.status_body`)."""
    return encode(status_body(instance, state, now, **extra))


@dataclass
class Health:
    instance: str
    started: float = field(default_factory=time.time)
    received: int = 0              # messages taken from the transport
    stored: int = 0                # messages whose batch committed
    acked: int = 0                 # acknowledgements sent to the broker
    stale_acks: int = 0            # committed on a connection that has gone (redelivered)
    accepted: int = 0              # message rows (accepted messages)
    duplicates: int = 0
    rejected: Counter = field(default_factory=Counter)
    shed: Counter = field(default_factory=Counter)
    derived_published: int = 0
    alarm_events: int = 0
    connected: bool = False
    connects: int = 0
    outages: int = 0
    outage_total_s: float = 0.0
    down_since: float | None = None
    last_error: str | None = None
    #: times the session was taken over by another client with this client id (recent)
    takeovers: list = field(default_factory=list)
    # per-interval figures (reset by report())
    _last_t: float = field(default_factory=time.monotonic)
    _last_received: int = 0
    _lag_max: float = 0.0
    _db_ms_max: float = 0.0
    _db_ms_last: float = 0.0
    _src_lag_sum: float = 0.0
    _src_lag_n: int = 0

    def outputs(self, out: Any) -> None:
        """Count what one drained batch of the core holds."""
        self.accepted += len(out.messages)
        self.duplicates += out.duplicates
        for r in out.rejected:
            self.rejected[r["category"]] += 1
        self.alarm_events += len(out.alarm_events)
        for m in out.messages:
            self._src_lag_sum += m["rx"] - m["time"]
            self._src_lag_n += 1

    def committed(self, n: int, lag_s: float, db_s: float) -> None:
        self.stored += n
        self._lag_max = max(self._lag_max, lag_s)
        self._db_ms_last = db_s * 1000
        self._db_ms_max = max(self._db_ms_max, db_s * 1000)

    def went_down(self, now: float, error: str) -> None:
        if self.connected:
            self.outages += 1
            self.down_since = now
        elif self.down_since is None:
            self.down_since = now
        self.connected = False
        self.last_error = error

    def came_up(self, now: float) -> float:
        """Mark connected; returns how long the outage lasted (0 on the first connect)."""
        gap = 0.0
        if self.down_since is not None and self.connects:
            gap = now - self.down_since
            self.outage_total_s += gap
        self.down_since = None
        self.connected = True
        self.connects += 1
        return gap

    def report(self, now: float, queue_depth: int, queue_max: int, inflight: int,
               writer_queue: int) -> dict[str, Any]:
        mono = time.monotonic()
        dt = max(mono - self._last_t, 1e-9)
        rate = (self.received - self._last_received) / dt
        outage = self.outage_total_s + (now - self.down_since
                                        if self.down_since is not None and self.connects else 0)
        d = {
            "v": 1, "kind": "health", "instance": self.instance, "time": format_epoch(now),
            "interval_s": round(dt, 2),
            "messages_per_s": round(rate, 1),
            "received": self.received, "stored": self.stored, "acknowledged": self.acked,
            "redelivery_pending": self.stale_acks,
            "accepted": self.accepted, "duplicates": self.duplicates,
            "rejected_total": sum(self.rejected.values()),
            "rejected": dict(sorted(self.rejected.items())),
            "lag_s": {"ingest_max": round(self._lag_max, 3),
                      "source_mean": (round(self._src_lag_sum / self._src_lag_n, 3)
                                      if self._src_lag_n else None)},
            "queue": {"depth": queue_depth, "max": queue_max, "unacknowledged": inflight,
                      "writer_batches": writer_queue},
            "db_write_ms": {"last": round(self._db_ms_last, 2),
                            "max": round(self._db_ms_max, 2)},
            "shed": dict(sorted(self.shed.items())), "shed_total": sum(self.shed.values()),
            "broker": {"connected": self.connected, "connects": self.connects,
                       "outages": self.outages, "outage_s": round(outage, 2),
                       "last_error": self.last_error,
                       "takeovers_10min": sum(1 for t in self.takeovers if now - t <= 600)},
            "derived_published": self.derived_published, "alarm_events": self.alarm_events,
        }
        self._last_t = mono
        self._last_received = self.received
        self._lag_max = 0.0
        self._db_ms_max = 0.0
        self._src_lag_sum = 0.0
        self._src_lag_n = 0
        return d


def log_line(d: dict[str, Any]) -> str:
    """One line for the log: figures only, never payload contents."""
    return (f"health: {d['messages_per_s']:.1f} msg/s, stored {d['stored']}, "
            f"duplicates {d['duplicates']}, rejected {d['rejected_total']}, "
            f"queue {d['queue']['depth']}/{d['queue']['max']} "
            f"(unacked {d['queue']['unacknowledged']}), "
            f"ingest lag max {d['lag_s']['ingest_max']:.3f} s, "
            f"db write {d['db_write_ms']['last']:.1f} ms (max {d['db_write_ms']['max']:.1f}), "
            f"shed {d['shed_total']}, broker "
            + ("connected" if d["broker"]["connected"] else "DOWN")
            + (f", outages {d['broker']['outages']} ({d['broker']['outage_s']:.1f} s)"
               if d["broker"]["outages"] else "")
            + (f", DATABASE WAITING {d['database']['waiting_s']:.0f} s "
               f"({d['database']['reason']})"
               if d.get("database", {}).get("state") == "waiting" else ""))
