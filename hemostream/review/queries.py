"""Database reads of the review: beds and their observed span, alarm events, notes,
commands, one bed's values over a window, and the configuration stored with the data."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Iterable

from sqlalchemy import func, select
from sqlalchemy.engine import Engine

from ..store import TABLES, config_in_force
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
        for r in conn.execute(select(msgs.c.bed_id, func.min(msgs.c.time), func.max(msgs.c.time))
                              .where(msgs.c.kind == "obs").group_by(msgs.c.bed_id)):
            b = beds.get(r[0])
            if b is not None:
                b.start, b.end = float(r[1]), float(r[2])
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
    obs: dict[str, list[tuple[float, float, str]]] = field(default_factory=dict)
    derived: dict[str, list[tuple[float, float, str, list]]] = field(default_factory=dict)
    periods: list[AlarmPeriod] = field(default_factory=list)
    info: list[InfoEvent] = field(default_factory=list)
    notes: list[dict[str, Any]] = field(default_factory=list)
    commands: list[dict[str, Any]] = field(default_factory=list)
    admissions: list[dict[str, Any]] = field(default_factory=list)


def load_bed(engine, bed: BedInfo, t0: float, t1: float, obs_params: list[str],
             der_params: list[str]) -> BedData:
    """One bed's observations and derived values of these parameters over [t0, t1] (with a
    margin), its admissions, alarm periods, information events, notes and commands."""
    obs_t, der_t, adm_t = TABLES["observations"], TABLES["derived"], TABLES["admissions"]
    bd = BedData(bed)
    margin = 120.0
    with engine.connect() as conn:
        for r in conn.execute(
                select(obs_t.c.param, obs_t.c.time, obs_t.c.value, obs_t.c.status)
                .where(obs_t.c.bed_id == bed.id, obs_t.c.param.in_(obs_params),
                       obs_t.c.time >= t0 - margin, obs_t.c.time <= t1 + margin)
                .order_by(obs_t.c.time, obs_t.c.id)):
            bd.obs.setdefault(r.param, []).append((r.time, r.value, r.status))
        for r in conn.execute(
                select(der_t.c.param, der_t.c.time, der_t.c.value, der_t.c.unit,
                       der_t.c.inputs)
                .where(der_t.c.bed_id == bed.id, der_t.c.param.in_(der_params),
                       der_t.c.time >= t0 - margin, der_t.c.time <= t1 + margin)
                .order_by(der_t.c.time, der_t.c.id)):
            try:
                inputs = json.loads(r.inputs)
            except ValueError:
                inputs = []
            bd.derived.setdefault(r.param, []).append((r.time, r.value, r.unit, inputs))
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
