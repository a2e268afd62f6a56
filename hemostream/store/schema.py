"""The tables (SQLAlchemy 2.0 typed models). Times are epoch seconds UTC (double)."""

from __future__ import annotations

from typing import cast

from sqlalchemy import (BigInteger, Boolean, Float, ForeignKey, Index, Integer, LargeBinary,
                        Sequence,
                        String, Table, Text, UniqueConstraint)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column


class Base(DeclarativeBase):
    pass


#: 64-bit ids on PostgreSQL; on SQLite only INTEGER PRIMARY KEY is the auto-incrementing rowid
BigId = BigInteger().with_variant(Integer, "sqlite")


class Bed(Base):
    __tablename__ = "beds"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    unit: Mapped[str] = mapped_column(String(32))
    bed: Mapped[str] = mapped_column(String(32))
    __table_args__ = (UniqueConstraint("unit", "bed"),)


class Message(Base):
    """Every accepted message (identity for duplicate detection, audit of arrival).

    Observation messages stay here until their bed's chunk is sealed; then their rows move
    into the chunk (``m_*`` columns, value-exact) and are read from there."""

    __tablename__ = "messages"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=False)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    rx: Mapped[float] = mapped_column(Float(53))
    topic: Mapped[str] = mapped_column(String(512))
    kind: Mapped[str] = mapped_column(String(8))
    device: Mapped[str | None] = mapped_column(String(64))
    seq: Mapped[int | None] = mapped_column(BigInteger)
    time: Mapped[float] = mapped_column(Float(53))
    late: Mapped[bool] = mapped_column(Boolean)
    n_obs: Mapped[int] = mapped_column(Integer)
    #: content digest of admit/note/cmd messages (their identity for duplicate detection)
    digest: Mapped[str | None] = mapped_column(String(16))
    __table_args__ = (Index("ix_messages_bed", "bed_id", "id"),)


class Admission(Base):
    __tablename__ = "admissions"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    height_cm: Mapped[float | None] = mapped_column(Float)
    weight_kg: Mapped[float | None] = mapped_column(Float)
    bsa_m2: Mapped[float | None] = mapped_column(Float)
    bsa_formula: Mapped[str | None] = mapped_column(String(16))
    limits: Mapped[str] = mapped_column(Text)
    discharged: Mapped[bool] = mapped_column(Boolean)


class Note(Base):
    __tablename__ = "notes"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    kind: Mapped[str] = mapped_column(String(32))
    volume_ml: Mapped[float | None] = mapped_column(Float)
    over_min: Mapped[float | None] = mapped_column(Float)
    param: Mapped[str | None] = mapped_column(String(16))
    by: Mapped[str | None] = mapped_column(String(64))
    text: Mapped[str | None] = mapped_column(Text)
    duration_s: Mapped[float | None] = mapped_column(Float)


class Command(Base):
    """Acknowledge / audio-pause commands as received, with what became of them (audit)."""

    __tablename__ = "commands"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    message_id: Mapped[int] = mapped_column(ForeignKey("messages.id"))
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    rx: Mapped[float] = mapped_column(Float(53))
    action: Mapped[str] = mapped_column(String(16))
    alarm: Mapped[str] = mapped_column(String(128))
    by: Mapped[str] = mapped_column(String(64))
    result: Mapped[str] = mapped_column(Text)


class Rejected(Base):
    """Input that failed a rule of the wire format: where, when, what and why."""

    __tablename__ = "rejected"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    rx: Mapped[float | None] = mapped_column(Float(53))
    topic: Mapped[str] = mapped_column(String(512))
    category: Mapped[str] = mapped_column(String(32))
    reason: Mapped[str] = mapped_column(Text)
    obs_index: Mapped[int | None] = mapped_column(Integer)
    device: Mapped[str | None] = mapped_column(String(64))
    seq: Mapped[int | None] = mapped_column(BigInteger)
    raw: Mapped[bytes] = mapped_column(LargeBinary)
    size: Mapped[int] = mapped_column(Integer)


class AlarmEvent(Base):
    """One alarm lifecycle transition (or rule information such as a fluid-challenge result)."""

    __tablename__ = "alarm_events"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    time: Mapped[float] = mapped_column(Float(53))
    alarm_id: Mapped[str] = mapped_column(String(128))
    rule: Mapped[str] = mapped_column(String(64))
    priority: Mapped[str] = mapped_column(String(8))
    category: Mapped[str] = mapped_column(String(16))
    transition: Mapped[str] = mapped_column(String(32))
    value: Mapped[float | None] = mapped_column(Float(53))
    details: Mapped[str] = mapped_column(Text)
    by: Mapped[str | None] = mapped_column(String(64))
    __table_args__ = (Index("ix_alarm_events_bed_time", "bed_id", "time"),)


class ConfigSnapshot(Base):
    """A configuration that came into force (replay or live run start), kept with the data so
    a review reads the limits that applied rather than those of today's file.

    ``time``: from when it applies (epoch seconds UTC; the newest stored arrival when it was
    written, 0 for an empty database), ``sha256`` of ``config`` (canonical JSON: sorted keys,
    no spaces). A configuration equal to the one last in force is not written again."""

    __tablename__ = "config_snapshots"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    time: Mapped[float] = mapped_column(Float(53))
    sha256: Mapped[str] = mapped_column(String(64))
    config: Mapped[str] = mapped_column(Text)
    __table_args__ = (Index("ix_config_snapshots_time", "time"),)


class ObsChunk(Base):
    """Observations and derived values of one bed, packed (see :mod:`.chunks`).

    ``t_min``/``t_max`` span every time inside (measurement times of observations, times of
    derived values); ``sealed`` chunks are merged and compressed, the others are the
    writer's per-batch segments. ``seq_max``: the last derived value's sequence number."""

    __tablename__ = "obs_chunks"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    t_min: Mapped[float] = mapped_column(Float(53))
    t_max: Mapped[float] = mapped_column(Float(53))
    n_messages: Mapped[int] = mapped_column(Integer)
    #: obs messages (identity, arrival) moved in from ``messages`` when it was sealed
    m_count: Mapped[int] = mapped_column(Integer, default=0)
    mid_max: Mapped[int | None] = mapped_column(BigInteger)
    rx_max: Mapped[float | None] = mapped_column(Float(53))
    msg_t_min: Mapped[float | None] = mapped_column(Float(53))
    msg_t_max: Mapped[float | None] = mapped_column(Float(53))
    n_obs: Mapped[int] = mapped_column(Integer)
    n_derived: Mapped[int] = mapped_column(Integer)
    seq_max: Mapped[int | None] = mapped_column(BigInteger)
    sealed: Mapped[bool] = mapped_column(Boolean)
    data: Mapped[bytes] = mapped_column(LargeBinary)
    __table_args__ = (Index("ix_obs_chunks_bed_time", "bed_id", "t_min"),
                      # a bed's open segments, the newest ids: found without reading every
                      # chunk row (each is a page or more of data) on a database of months
                      Index("ix_obs_chunks_bed_sealed", "bed_id", "sealed"),
                      Index("ix_obs_chunks_mid_max", "mid_max"),
                      Index("ix_obs_chunks_seq_max", "seq_max"))


class ObsStaging(Base):
    """A write batch's observations and derived values of every bed, packed as one block
    (:mod:`.chunks`: the columns of a segment plus ``o_bed``/``d_bed``), one row per group
    of beds. The writer splits the staged blocks into per-bed segments of ``obs_chunks``
    a group at a time, in turn (each group about every ``store.stage_messages`` messages or
    ``store.stage_s`` seconds), so a batch of a hundred beds costs a few encoded rows rather than a
    hundred. Readers read staged rows as well."""

    __tablename__ = "obs_staging"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    #: the group of beds (bed id modulo [store] stage_groups) whose values the row holds
    grp: Mapped[int] = mapped_column(Integer, default=0)
    t_min: Mapped[float] = mapped_column(Float(53))
    t_max: Mapped[float] = mapped_column(Float(53))
    n_messages: Mapped[int] = mapped_column(Integer)
    n_obs: Mapped[int] = mapped_column(Integer)
    n_derived: Mapped[int] = mapped_column(Integer)
    mid_max: Mapped[int | None] = mapped_column(BigInteger)
    seq_max: Mapped[int | None] = mapped_column(BigInteger)
    data: Mapped[bytes] = mapped_column(LargeBinary)


class MinuteStat(Base):
    """Per-minute summary of one bed's parameter (observation or derived value), kept after
    the full-rate data is pruned: median, min, max and count of its valid values."""

    __tablename__ = "minute_stats"
    id: Mapped[int] = mapped_column(BigId, primary_key=True, autoincrement=True)
    bed_id: Mapped[int] = mapped_column(ForeignKey("beds.id"))
    source: Mapped[str] = mapped_column(String(8))       # "obs" or "derived"
    param: Mapped[str] = mapped_column(String(16))
    minute: Mapped[float] = mapped_column(Float(53))     # epoch s of the minute's start
    unit: Mapped[str] = mapped_column(String(16))
    n: Mapped[int] = mapped_column(Integer)
    median: Mapped[float] = mapped_column(Float(53))
    min: Mapped[float] = mapped_column(Float(53))
    max: Mapped[float] = mapped_column(Float(53))
    __table_args__ = (Index("ix_minute_stats_bed_param_minute", "bed_id", "param", "minute"),)


TABLES: dict[str, Table] = {k: cast(Table, v) for k, v in {
    "beds": Bed.__table__, "messages": Message.__table__,
    "obs_chunks": ObsChunk.__table__, "obs_staging": ObsStaging.__table__,
    "minute_stats": MinuteStat.__table__,
    "admissions": Admission.__table__, "notes": Note.__table__,
    "commands": Command.__table__, "rejected": Rejected.__table__,
    "alarm_events": AlarmEvent.__table__, "config_snapshots": ConfigSnapshot.__table__,
}.items()}
#: insertion order that respects foreign keys
INSERT_ORDER = ("beds", "messages", "observations", "derived", "admissions", "notes",
                "commands", "rejected", "alarm_events", "config_snapshots", "minute_stats")
#: the rows the writer turns into chunks rather than table rows
CHUNKED = ("observations", "derived")




# --------------------------------------------------------------------------- workers

#: fencing tokens of unit leases (PostgreSQL; one per claim, ever increasing)
LEASE_TOKENS = Sequence("worker_lease_tokens", metadata=Base.metadata)


class WorkerLease(Base):
    """Which worker processes which unit (docs/workers.md). Times are the database's clock
    (epoch seconds), so the workers' own clocks never decide who owns what.

    ``token`` is a fencing token, new on every claim: the owner's every write transaction
    first checks that the row still carries its token (``FOR SHARE``), so a worker that lost
    the unit cannot commit another row for it; the token also picks the owner's block of
    message and bed ids (:mod:`hemostream.live.leases`)."""

    __tablename__ = "worker_leases"
    unit: Mapped[str] = mapped_column(String(32), primary_key=True)
    owner: Mapped[str] = mapped_column(String(128))
    token: Mapped[int] = mapped_column(BigInteger)
    since: Mapped[float] = mapped_column(Float(53))
    renewed: Mapped[float] = mapped_column(Float(53))
    expires: Mapped[float] = mapped_column(Float(53))
    #: arrival-to-commit seconds of the owner's last committed batch, and when it was
    lag_s: Mapped[float | None] = mapped_column(Float(53))
    stored_at: Mapped[float | None] = mapped_column(Float(53))


class WorkerMember(Base):
    """A running worker, seen at its last renewal: the sharing counts the live ones."""

    __tablename__ = "worker_members"
    name: Mapped[str] = mapped_column(String(128), primary_key=True)
    started: Mapped[float] = mapped_column(Float(53))
    seen: Mapped[float] = mapped_column(Float(53))
    expires: Mapped[float] = mapped_column(Float(53))
