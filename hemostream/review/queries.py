"""Database reads of the review: beds and their observed span, alarm events, notes,
commands, one bed's values over a window, and the configuration stored with the data."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Iterable

from sqlalchemy import func, select
from sqlalchemy.engine import Engine

from ..store import TABLES, config_in_force, iter_derived, iter_observations
from .periods import AlarmPeriod, InfoEvent, build_periods


@dataclass
class BedInfo:
    id: int
    unit: str
    bed: str
    start: float | None = None      # first and last measurement time of its obs messages
    end: float | None = None

    @property
    def key(self) -> str:
        return f"{self.unit}/{self.bed}"

    @property
    def span_s(self) -> float:
        if self.start is None or self.end is None:
            return 0.0
        return max(0.0, self.end - self.start)


def load_beds(engine: Engine) -> dict[int, BedInfo]:
    """Every bed, with the span of measurement times of its observation messages."""
    beds_t, msgs = TABLES["beds"], TABLES["messages"]
    with engine.connect() as conn:
        beds = {r.id: BedInfo(r.id, r.unit, r.bed)
                for r in conn.execute(select(beds_t).order_by(beds_t.c.unit, beds_t.c.bed))}
        ch = TABLES["obs_chunks"]
        spans = list(conn.execute(select(msgs.c.bed_id, func.min(msgs.c.time),
                                         func.max(msgs.c.time))
                                  .where(msgs.c.kind == "obs").group_by(msgs.c.bed_id)))
        spans += list(conn.execute(select(ch.c.bed_id, func.min(ch.c.msg_t_min),
                                          func.max(ch.c.msg_t_max))
                                   .where(ch.c.m_count > 0).group_by(ch.c.bed_id)))
        for r in spans:                 # messages still in the table, and in sealed chunks
            b = beds.get(r[0])
            if b is not None and r[1] is not None:
                lo, hi = float(r[1]), float(r[2])
                b.start = lo if b.start is None else min(b.start, lo)
                b.end = hi if b.end is None else max(b.end, hi)
    return beds


def find_beds(beds: dict[int, BedInfo], spec: str) -> list[BedInfo]:
    """Beds matching ``UNIT/BED`` or ``BED`` (all units)."""
    if "/" in spec:
        u, b = spec.split("/", 1)
        return [x for x in beds.values() if x.unit == u and x.bed == b]
    return [x for x in beds.values() if x.bed == spec]


def alarm_rows(engine: Engine, bed_ids: Iterable[int] | None = None) -> list[Any]:
    t = TABLES["alarm_events"]
    stmt = select(t).order_by(t.c.id)
    if bed_ids is not None:
        stmt = stmt.where(t.c.bed_id.in_(list(bed_ids)))
    with engine.connect() as conn:
        return list(conn.execute(stmt))


def notes(engine: Engine, bed_ids: Iterable[int] | None = None) -> list[dict[str, Any]]:
    t = TABLES["notes"]
    stmt = select(t).order_by(t.c.time, t.c.id)
    if bed_ids is not None:
        stmt = stmt.where(t.c.bed_id.in_(list(bed_ids)))
    with engine.connect() as conn:
        return [dict(r._mapping) for r in conn.execute(stmt)]


def commands(engine: Engine, bed_ids: Iterable[int] | None = None) -> list[dict[str, Any]]:
    t = TABLES["commands"]
    stmt = select(t).order_by(t.c.time, t.c.id)
    if bed_ids is not None:
        stmt = stmt.where(t.c.bed_id.in_(list(bed_ids)))
    with engine.connect() as conn:
        return [dict(r._mapping) for r in conn.execute(stmt)]


@dataclass
class BedData:
    bed: BedInfo
    #: param -> (time, value, status, quality)
    obs: dict[str, list[tuple[float, float, str, str]]] = field(default_factory=dict)
    #: param -> (time, value, unit, inputs, quality)
    derived: dict[str, list[tuple[float, float, str, list, str]]] = field(default_factory=dict)
    periods: list[AlarmPeriod] = field(default_factory=list)
    info: list[InfoEvent] = field(default_factory=list)
    notes: list[dict[str, Any]] = field(default_factory=list)
    commands: list[dict[str, Any]] = field(default_factory=list)
    admissions: list[dict[str, Any]] = field(default_factory=list)


def load_bed(engine, bed: BedInfo, t0: float, t1: float, obs_params: list[str],
             der_params: list[str]) -> BedData:
    """One bed's observations and derived values of these parameters over [t0, t1] (with a
    margin), its admissions, alarm periods, information events, notes and commands."""
    adm_t = TABLES["admissions"]
    bd = BedData(bed)
    margin = 120.0
    with engine.connect() as conn:
        for t, _m, _b, param, value, _u, status, *_, quality in iter_observations(
                conn, [bed.id], obs_params, t0 - margin, t1 + margin):
            bd.obs.setdefault(param, []).append((t, value, status, quality))
        for t, _q, _b, param, value, unit, text, quality in iter_derived(
                conn, [bed.id], der_params, t0 - margin, t1 + margin):
            try:
                inputs = json.loads(text)
            except ValueError:
                inputs = []
            bd.derived.setdefault(param, []).append((t, value, unit, inputs, quality))
        bd.admissions = [dict(r._mapping) for r in conn.execute(
            select(adm_t).where(adm_t.c.bed_id == bed.id).order_by(adm_t.c.time, adm_t.c.id))]
    bd.periods, bd.info = build_periods(alarm_rows(engine, [bed.id]))
    bd.notes = notes(engine, [bed.id])
    bd.commands = commands(engine, [bed.id])
    return bd


def stored_config(engine: Engine, at: float) -> dict[str, Any] | None:
    """The configuration stored with the data (``config_snapshots``) in force at ``at``, as
    parsed JSON; None for a database that holds none."""
    return config_in_force(engine, at)
