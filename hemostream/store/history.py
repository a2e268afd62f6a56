"""One unit's stored past, read back as the messages that made it (for a worker taking a
unit over: docs/workers.md).

A new owner of a unit rebuilds each bed's state (latest values, trend windows, alarm states)
by feeding the unit's recent messages through its own processor again, without storing or
publishing what comes out; and it learns their identities so that what the broker delivers
again is dropped as a duplicate. Both read through the store's readers, so messages already
sealed into compressed chunks count as much as those still in ``messages``.

The messages are rebuilt from what was stored: an obs message from its identity and its
stored observations (value and unit as received, status, the observation's own time when it
differs); admit, note and cmd messages from their rows. Observations that were refused when
they came are not stored and so not fed again, which is what their first processing did
with them too.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.engine import Connection

from ..core.dedup import obs_identity
from ..core.wire import format_epoch as iso
from .reading import iter_observations, sealed_messages
from .schema import TABLES


@dataclass
class UnitPast:
    """What a new owner of a unit reads before it takes new messages."""

    #: (bed id, unit, bed) of the unit's beds
    beds: list[tuple[int, str, str]]
    #: (rx, topic, payload bytes) in arrival order: the messages to feed again
    messages: list[tuple[float, str, bytes]] = field(default_factory=list)
    #: (device or topic, identity) of the unit's recent messages, for duplicate detection
    identities: list[tuple[str, Any]] = field(default_factory=list)
    #: arrival time of the newest stored message of the unit (None: nothing stored yet)
    newest_rx: float | None = None
    #: (bed key "unit/bed", rule) -> the highest alarm id number raised before the first
    #: message fed again: the rebuilt alarm book numbers on from there
    alarm_counts: dict[tuple[str, str], int] = field(default_factory=dict)


def _newest_rx(conn: Connection, bed_ids: list[int]) -> float | None:
    m, ch = TABLES["messages"], TABLES["obs_chunks"]
    vals = [conn.execute(select(func.max(m.c.rx)).where(m.c.bed_id.in_(bed_ids))).scalar(),
            conn.execute(select(func.max(ch.c.rx_max)).where(ch.c.bed_id.in_(bed_ids))).scalar()]
    got = [v for v in vals if v is not None]
    return max(got) if got else None


def unit_past(conn: Connection, unit: str, history_s: float,
              identities_s: float = 600.0) -> UnitPast:
    """The unit's messages that arrived within ``history_s`` before its newest one (and each
    bed's newest admission before that: the limits in force), and the identities of those
    that arrived within ``max(history_s, identities_s)``."""
    b, m = TABLES["beds"], TABLES["messages"]
    beds = [(r.id, r.unit, r.bed) for r in conn.execute(select(b).where(b.c.unit == unit))]
    past = UnitPast(beds)
    if not beds:
        return past
    names = {bid: bed for bid, _u, bed in beds}
    ids = list(names)
    newest = past.newest_rx = _newest_rx(conn, ids)
    if newest is None:
        return past
    start = newest - history_s
    keep = newest - max(history_s, identities_s)
    rows = [dict(r._mapping) for r in conn.execute(
        select(m).where(m.c.bed_id.in_(ids), m.c.rx >= keep))]
    rows += list(sealed_messages(conn, bed_ids=ids, rx_from=keep))
    rows.sort(key=lambda r: (r["rx"], r["id"]))
    for r in rows:
        if r["kind"] == "obs":
            past.identities.append((r["device"], obs_identity(r["seq"], r["time"])))
        else:
            past.identities.append((r["topic"], (r["kind"], r["time"], r["digest"])))
    window = [r for r in rows if r["rx"] >= start]
    # the newest admission of each bed from before the window: its limits still apply
    before: dict[int, dict[str, Any]] = {}
    for a in conn.execute(select(m).where(m.c.bed_id.in_(ids), m.c.kind == "admit",
                                          m.c.rx < start).order_by(m.c.rx, m.c.id)):
        before[a.bed_id] = dict(a._mapping)
    chosen = sorted(before.values(), key=lambda r: (r["rx"], r["id"])) + window
    bodies = _bodies(conn, chosen, names)
    past.messages = [(r["rx"], r["topic"], bodies[r["id"]]) for r in chosen if r["id"] in bodies]
    first = min((r["time"] for r in window), default=None)
    past.alarm_counts = _alarm_counts(conn, ids, first)
    return past


def _alarm_counts(conn: Connection, bed_ids: list[int], before: float | None
                  ) -> dict[tuple[str, str], int]:
    """Alarm ids look like ``<rule>@<unit>/<bed>#<n>``: the highest n of each (bed, rule)
    among the alarms raised before ``before`` (all of them when None)."""
    a = TABLES["alarm_events"]
    stmt = select(a.c.alarm_id).where(a.c.bed_id.in_(bed_ids), a.c.transition == "raised")
    if before is not None:
        stmt = stmt.where(a.c.time < before)
    out: dict[tuple[str, str], int] = {}
    for (aid,) in conn.execute(stmt):
        rule, _, rest = aid.partition("@")
        bed, _, n = rest.rpartition("#")
        if bed and n.isdigit():
            key = (bed, rule)
            out[key] = max(out.get(key, 0), int(n))
    return out


def _bodies(conn: Connection, rows: list[dict[str, Any]], names: dict[int, str]
            ) -> dict[int, bytes]:
    """Payloads of the given message rows, rebuilt from what was stored (by message id)."""
    out: dict[int, bytes] = {}
    obs_rows = {r["id"]: r for r in rows if r["kind"] == "obs"}
    if obs_rows:
        items: dict[int, list[dict[str, Any]]] = {}
        t0 = min(r["time"] for r in obs_rows.values()) - 86400.0
        for t, mid, _bed, param, _v, _u, status, raw_v, raw_u, _late, _q in iter_observations(
                conn, list(names), t0=t0):
            m = obs_rows.get(mid)
            if m is None:
                continue
            o: dict[str, Any] = {"param": param, "value": raw_v, "unit": raw_u}
            if status != "valid":
                o["status"] = status
            if t != m["time"]:
                o["time"] = iso(t)
            items.setdefault(mid, []).append(o)
        for mid, obs in items.items():
            m = obs_rows[mid]
            out[mid] = _dump({"v": 1, "device": m["device"], "seq": m["seq"],
                              "time": iso(m["time"]), "obs": obs})
    others = {r["id"]: r for r in rows if r["kind"] != "obs"}
    if not others:
        return out
    ids = list(others)
    for kind, name in (("admit", "admissions"), ("note", "notes"), ("cmd", "commands")):
        t = TABLES[name]
        for k in range(0, len(ids), 500):
            for r in conn.execute(select(t).where(t.c.message_id.in_(ids[k:k + 500]))):
                d = dict(r._mapping)
                out[d["message_id"]] = _dump(_payload(kind, d))
    return out


def _payload(kind: str, d: dict[str, Any]) -> dict[str, Any]:
    body: dict[str, Any] = {"v": 1, "time": iso(d["time"])}
    if kind == "admit":
        body.update(height_cm=d["height_cm"], weight_kg=d["weight_kg"],
                    limits=json.loads(d["limits"] or "{}"), discharged=bool(d["discharged"]))
    elif kind == "note":
        body.update({k: d[k] for k in ("kind", "volume_ml", "over_min", "param", "by", "text",
                                       "duration_s")})
    else:
        body.update(action=d["action"], alarm=d["alarm"], by=d["by"])
    return {k: v for k, v in body.items() if v is not None}


def _dump(body: dict[str, Any]) -> bytes:
    return json.dumps(body, separators=(",", ":")).encode()
