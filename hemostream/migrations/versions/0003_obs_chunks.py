"""Observations and derived values in per-bed chunks; per-minute statistics.

Every row of ``observations`` and ``derived`` is moved, value-exact, into sealed chunks of
``obs_chunks`` (one per bed per up to 900 observation messages), together with those
messages' rows (identity, arrival); then the two tables are dropped. ``minute_stats`` is
new (filled when full-rate data is pruned). The index on messages (device, id) gives way to
one on (bed_id, id), which sealing uses. One way only: there is no downgrade.

Revision ID: 0003
Revises: 0002
"""

import bisect

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

SLICE = 900


def _tables(big):
    op.create_table(
        "obs_chunks",
        sa.Column("id", big, primary_key=True, autoincrement=True),
        sa.Column("bed_id", sa.Integer, sa.ForeignKey("beds.id"), nullable=False),
        sa.Column("t_min", sa.Float(53), nullable=False),
        sa.Column("t_max", sa.Float(53), nullable=False),
        sa.Column("n_messages", sa.Integer, nullable=False),
        sa.Column("m_count", sa.Integer, nullable=False),
        sa.Column("mid_max", sa.BigInteger),
        sa.Column("rx_max", sa.Float(53)),
        sa.Column("msg_t_min", sa.Float(53)),
        sa.Column("msg_t_max", sa.Float(53)),
        sa.Column("n_obs", sa.Integer, nullable=False),
        sa.Column("n_derived", sa.Integer, nullable=False),
        sa.Column("seq_max", sa.BigInteger),
        sa.Column("sealed", sa.Boolean, nullable=False),
        sa.Column("data", sa.LargeBinary, nullable=False))
    op.create_index("ix_obs_chunks_bed_time", "obs_chunks", ["bed_id", "t_min"])
    op.create_table(
        "minute_stats",
        sa.Column("id", big, primary_key=True, autoincrement=True),
        sa.Column("bed_id", sa.Integer, sa.ForeignKey("beds.id"), nullable=False),
        sa.Column("source", sa.String(8), nullable=False),
        sa.Column("param", sa.String(16), nullable=False),
        sa.Column("minute", sa.Float(53), nullable=False),
        sa.Column("unit", sa.String(16), nullable=False),
        sa.Column("n", sa.Integer, nullable=False),
        sa.Column("median", sa.Float(53), nullable=False),
        sa.Column("min", sa.Float(53), nullable=False),
        sa.Column("max", sa.Float(53), nullable=False))
    op.create_index("ix_minute_stats_bed_param_minute", "minute_stats",
                    ["bed_id", "param", "minute"])


def upgrade() -> None:
    import numpy as np

    from hemostream.store.chunks import block_of, chunk_row

    conn = op.get_bind()
    big = sa.BigInteger().with_variant(sa.Integer, "sqlite")
    _tables(big)
    chunks = sa.table("obs_chunks", *[sa.column(c) for c in (
        "bed_id", "t_min", "t_max", "n_messages", "m_count", "mid_max", "rx_max",
        "msg_t_min", "msg_t_max", "n_obs", "n_derived", "seq_max", "sealed", "data")])
    ocols = ("message_id", "bed_id", "param", "time", "value", "unit", "raw_value",
             "raw_unit", "status", "late")
    mcols = ("id", "rx", "topic", "device", "seq", "time", "late", "n_obs")
    for (bed_id,) in conn.execute(sa.text("SELECT id FROM beds ORDER BY id")).all():
        msgs = conn.execute(sa.text(
            "SELECT id, rx, topic, device, seq, time, late, n_obs FROM messages "
            "WHERE bed_id = :b AND kind = 'obs' ORDER BY id"), {"b": bed_id}).all()
        slices = [msgs[i:i + SLICE] for i in range(0, len(msgs), SLICE)] or [[]]
        # derived values go with the slice whose time span they fall in
        bounds, hi = [], float("-inf")
        for s in slices[1:]:
            hi = max(hi, s[0].time)
            bounds.append(hi)
        ders = [dict(r._mapping) for r in conn.execute(sa.text(
            "SELECT id, bed_id, param, time, value, unit, inputs FROM derived "
            "WHERE bed_id = :b ORDER BY id"), {"b": bed_id})]
        der_of: list[list[dict]] = [[] for _ in slices]
        for d in ders:
            der_of[bisect.bisect_right(bounds, d["time"])].append(d)
        for s, der in zip(slices, der_of):
            obs = []
            if s:
                obs = [tuple(bool(x) if c == "late" else x for c, x in zip(ocols, r))
                       for r in conn.execute(sa.text(
                           "SELECT " + ", ".join(ocols) + " FROM observations WHERE "
                           "bed_id = :b AND message_id >= :lo AND message_id <= :hi "
                           "ORDER BY id"), {"b": bed_id, "lo": s[0].id, "hi": s[-1].id})]
                ids = {m.id for m in s}
                obs = [o for o in obs if o[0] in ids]
            if not s and not der:
                continue
            blk = block_of(obs, der, 0)
            if der:        # keep the stored order: the old row ids are the sequence numbers
                blk["d_seq"] = np.array([d["id"] for d in der], np.int64)
            if s:
                cols = list(zip(*[tuple(m) for m in s]))
                blk.update(m_id=np.array(cols[0], np.int64),
                           m_rx=np.array(cols[1], np.float64), m_topic=list(cols[2]),
                           m_device=list(cols[3]), m_seq=np.array(cols[4], np.int64),
                           m_time=np.array(cols[5], np.float64),
                           m_late=np.array([bool(x) for x in cols[6]], bool),
                           m_nobs=np.array(cols[7], np.int64))
            conn.execute(chunks.insert(), [chunk_row(bed_id, blk, True, 9)])
        conn.execute(sa.text("DELETE FROM messages WHERE bed_id = :b AND kind = 'obs'"),
                     {"b": bed_id})
    left = conn.execute(sa.text(
        "SELECT count(*) FROM observations WHERE message_id NOT IN "
        "(SELECT id FROM messages)")).scalar()
    moved = conn.execute(sa.text("SELECT coalesce(sum(n_obs), 0) FROM obs_chunks")).scalar()
    total = conn.execute(sa.text("SELECT count(*) FROM observations")).scalar()
    if moved != total:
        raise RuntimeError(f"upgrade stopped: {moved} of {total} observations moved "
                           f"({left} without a message); nothing was changed")
    dmoved = conn.execute(sa.text("SELECT coalesce(sum(n_derived), 0) FROM obs_chunks")
                          ).scalar()
    dtotal = conn.execute(sa.text("SELECT count(*) FROM derived")).scalar()
    if dmoved != dtotal:
        raise RuntimeError(f"upgrade stopped: {dmoved} of {dtotal} derived values moved; "
                           "nothing was changed")
    op.drop_index("ix_observations_bed_param_time", "observations")
    op.drop_table("observations")
    op.drop_index("ix_derived_bed_param_time", "derived")
    op.drop_table("derived")
    op.drop_index("ix_messages_device", "messages")
    op.create_index("ix_messages_bed", "messages", ["bed_id", "id"])


def downgrade() -> None:
    raise NotImplementedError("hemostream databases are upgraded one way only")
