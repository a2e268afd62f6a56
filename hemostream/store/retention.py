"""Retention: what ``hemostream db prune`` (and the live service, on a schedule) removes,
and ``hemostream db stats``.

Full-rate data (chunks of observations and derived values, with the observation messages
they hold; observation messages still in ``messages``) older than ``full_rate_days`` (by
measurement time) is summarised into ``minute_stats`` (median, min, max, count of the values
whose quality is ok, per bed, parameter and minute) and removed. Minute statistics go after
``minute_stats_days``; alarm events, notes, commands, admissions, rejects (by arrival) and
their messages after ``audit_days``; the configuration in force at the audit cutoff is kept.
A chunk is removed whole, only when all of it is older than the cutoff.
"""

from __future__ import annotations

import time as _time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sqlalchemy import delete, func, insert, select
from sqlalchemy.engine import Engine

from .chunks import decode, qualities
from .schema import TABLES

DAY = 86400.0


@dataclass
class PruneReport:
    now: float
    dry_run: bool
    cutoffs: dict[str, float | None] = field(default_factory=dict)
    #: rows removed (or that would be) per table; chunked data as observations/derived
    removed: dict[str, int] = field(default_factory=dict)
    minute_stats_added: int = 0
    #: PostgreSQL: day partitions of obs_chunks dropped whole (their chunks are in removed)
    partitions_dropped: int = 0
    #: SQLite: pages given back to the file system after the deletes
    pages_freed: int = 0

    def as_dict(self) -> dict[str, Any]:
        return {"now": self.now, "dry_run": self.dry_run, "cutoffs": self.cutoffs,
                "removed": self.removed, "minute_stats_added": self.minute_stats_added,
                "partitions_dropped": self.partitions_dropped,
                "pages_freed": self.pages_freed}


def minute_stats(bed_id: int, blk: dict[str, Any]) -> list[dict[str, Any]]:
    """Per-minute median/min/max/count of a chunk's observations and derived values whose
    quality is ok (a valid status, no artifact).

    >>> blk = {"o_param": ["HR", "HR", "HR"], "o_time": np.array([0.0, 30.0, 61.0]),
    ...        "o_value": np.array([70.0, 80.0, 90.0]), "o_unit": ["/min"] * 3,
    ...        "o_status": ["valid"] * 3}
    >>> [(r["minute"], r["n"], r["median"]) for r in minute_stats(1, blk)]
    [(0.0, 2, 75.0), (60.0, 1, 90.0)]
    >>> blk["o_quality"] = ["ok", "artifact", "ok"]
    >>> [(r["minute"], r["n"], r["max"]) for r in minute_stats(1, blk)]
    [(0.0, 1, 70.0), (60.0, 1, 90.0)]
    """
    out: list[dict[str, Any]] = []
    for src, pre in (("obs", "o_"), ("derived", "d_")):
        if pre + "param" not in blk:
            continue
        params = np.asarray(blk[pre + "param"], dtype=object)
        t, v = blk[pre + "time"], blk[pre + "value"]
        units = blk[pre + "unit"]
        # only ok values: not a status other than valid, not an artifact (a flush must not
        # become a minute's maximum); docs/rules.md, "Quality"
        ok = np.asarray(qualities(blk, pre[0]), dtype=object) == "ok"
        unit_of = dict(zip(blk[pre + "param"], units))
        minute = np.floor(t / 60.0) * 60.0
        for p in sorted(set(params[ok].tolist())):
            sel = ok & (params == p)
            mins, vals = minute[sel], v[sel]
            for m in np.unique(mins).tolist():
                x = vals[mins == m]
                out.append({"bed_id": bed_id, "source": src, "param": p, "minute": m,
                            "unit": unit_of[p], "n": int(len(x)),
                            "median": float(np.median(x)), "min": float(x.min()),
                            "max": float(x.max())})
    return out


def prune(engine: Engine, retention: Any, now: float | None = None,
          dry_run: bool = False) -> PruneReport:
    now = _time.time() if now is None else now
    rep = PruneReport(now=now, dry_run=dry_run)
    full = now - retention.full_rate_days * DAY if retention.full_rate_days else None
    mins = now - retention.minute_stats_days * DAY if retention.minute_stats_days else None
    audit = now - retention.audit_days * DAY if retention.audit_days else None
    rep.cutoffs = {"full_rate": full, "minute_stats": mins, "audit": audit}
    T = TABLES
    ch, msgs = T["obs_chunks"], T["messages"]

    def gone(name: str, n: int | None) -> None:
        if n:
            rep.removed[name] = rep.removed.get(name, 0) + int(n)

    with engine.begin() as conn:
        if full is not None:
            old = conn.execute(select(ch.c.id, ch.c.bed_id, ch.c.t_min, ch.c.n_obs,
                                      ch.c.n_derived, ch.c.m_count, ch.c.data)
                               .where(ch.c.t_max < full)).all()
            stats: list[dict] = []
            for c in old:
                gone("observations", c.n_obs)
                gone("derived", c.n_derived)
                gone("messages", c.m_count)
                stats += [s for s in minute_stats(c.bed_id, decode(c.data))
                          if mins is None or s["minute"] >= mins]
            rep.minute_stats_added = len(stats)
            n_msg = conn.execute(select(func.count()).select_from(msgs).where(
                msgs.c.kind == "obs", msgs.c.time < full)).scalar()
            gone("messages", n_msg)
            days: list[tuple[int, str]] = []
            if conn.dialect.name == "postgresql":
                from . import pg
                days = pg.droppable(conn, full)
                rep.partitions_dropped = len(days)
            if not dry_run:
                if stats:
                    conn.execute(insert(T["minute_stats"]), stats)
                ids = [c.id for c in old]
                if days:                                  # whole days: drop partitions
                    pg.drop(conn, [n for _d, n in days])
                    pg.known(engine).forget()
                    gone_days = {d for d, _n in days}
                    ids = [c.id for c in old if pg.day_of(c.t_min) not in gone_days]
                for k in range(0, len(ids), 500):
                    conn.execute(delete(ch).where(ch.c.id.in_(ids[k:k + 500])))
                conn.execute(delete(msgs).where(msgs.c.kind == "obs", msgs.c.time < full))
        if mins is not None:
            ms = T["minute_stats"]
            gone("minute_stats", conn.execute(select(func.count()).select_from(ms)
                                              .where(ms.c.minute < mins)).scalar())
            if not dry_run:
                conn.execute(delete(ms).where(ms.c.minute < mins))
        if audit is not None:
            for name, col in (("alarm_events", "time"), ("notes", "time"),
                              ("commands", "time"), ("admissions", "time"),
                              ("rejected", "rx")):
                t = T[name]
                cond = t.c[col] < audit
                gone(name, conn.execute(select(func.count()).select_from(t).where(cond))
                     .scalar())
                if not dry_run:
                    conn.execute(delete(t).where(cond))
            cond = (msgs.c.kind != "obs") & (msgs.c.time < audit)
            gone("messages", conn.execute(select(func.count()).select_from(msgs)
                                          .where(cond)).scalar())
            if not dry_run:
                conn.execute(delete(msgs).where(cond))
            cs = T["config_snapshots"]
            keep = conn.execute(select(cs.c.id).where(cs.c.time < audit)
                                .order_by(cs.c.time.desc(), cs.c.id.desc()).limit(1)).scalar()
            if keep is not None:
                cond = (cs.c.time < audit) & (cs.c.id != keep)
                gone("config_snapshots", conn.execute(select(func.count()).select_from(cs)
                                                      .where(cond)).scalar())
                if not dry_run:
                    conn.execute(delete(cs).where(cond))
    if not dry_run:
        from .space import give_back_free_pages
        rep.pages_freed = give_back_free_pages(engine)
    return rep


def table_bytes(engine: Engine) -> dict[str, int | None]:
    """On-disk bytes per table, its indexes included (SQLite dbstat, PostgreSQL
    pg_total_relation_size); None where the database cannot say."""
    out: dict[str, int | None] = {n: None for n in TABLES}
    with engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            try:
                rows = conn.exec_driver_sql(
                    "SELECT s.tbl_name, sum(d.pgsize) FROM dbstat d JOIN sqlite_schema s "
                    "ON s.name = d.name GROUP BY s.tbl_name").all()
            except Exception:  # noqa: BLE001 - SQLite built without dbstat
                return out
            got: dict[str, Any] = {r[0]: int(r[1]) for r in rows}
        elif engine.dialect.name == "postgresql":
            got = {}
            for n in TABLES:       # a partitioned table: the sum of its partitions
                got[n] = conn.exec_driver_sql(
                    "SELECT coalesce((SELECT sum(pg_total_relation_size(relid)) FROM "
                    "pg_partition_tree(r)), pg_total_relation_size(r)) "
                    "FROM to_regclass(%(n)s) r", {"n": n}).scalar()
                got[n] = None if got[n] is None else int(got[n])
        else:
            return out
    out.update({n: got.get(n) for n in TABLES})
    return out


def stats(engine: Engine) -> dict[str, Any]:
    """Rows and bytes per table, full-rate span per bed, bytes per bed-day."""
    from . import message_count

    T = TABLES
    ch, msgs = T["obs_chunks"], T["messages"]
    rows: dict[str, int] = {}
    with engine.connect() as conn:
        for n, t in T.items():
            rows[n] = int(conn.execute(select(func.count()).select_from(t)).scalar() or 0)
        n_obs, n_der = 0, 0
        for tab in (ch, T["obs_staging"]):          # chunks, and values not yet split
            o, d = conn.execute(select(func.coalesce(func.sum(tab.c.n_obs), 0),
                                       func.coalesce(func.sum(tab.c.n_derived), 0))).one()
            n_obs, n_der = n_obs + o, n_der + d
        spans: dict[int, list[Any]] = {}
        for b, lo, hi in list(conn.execute(select(ch.c.bed_id, func.min(ch.c.t_min),
                                                  func.max(ch.c.t_max))
                                           .group_by(ch.c.bed_id))) + list(conn.execute(
                select(msgs.c.bed_id, func.min(msgs.c.time), func.max(msgs.c.time))
                .group_by(msgs.c.bed_id))):
            s = spans.setdefault(b, [lo, hi])
            s[0], s[1] = min(s[0], lo), max(s[1], hi)
    sizes = table_bytes(engine)
    total = sum(v for v in sizes.values() if v) if any(sizes.values()) else None
    bed_days = sum(hi - lo for lo, hi in spans.values()) / DAY
    return {"tables": {n: {"rows": rows[n], "bytes": sizes.get(n)} for n in T},
            "observations": int(n_obs), "derived": int(n_der),
            "messages": message_count(engine), "beds_with_data": len(spans),
            "bed_days": bed_days, "bytes": total,
            "bytes_per_bed_day": (total / bed_days) if total and bed_days > 0 else None}
