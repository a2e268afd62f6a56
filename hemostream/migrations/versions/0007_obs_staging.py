"""``obs_staging``: each write batch's observations and derived values as one packed row
per group of beds (``grp``: bed id modulo 16), split into per-bed segments of
``obs_chunks`` a group at a time, in turn, each about once a minute (or per 20,000 messages;
hemostream/store/chunks.py). A new table only; both SQLite and
PostgreSQL (not partitioned: its rows live about a minute).

Revision ID: 0007_obs_staging
Revises: 0006_chunk_indexes
"""

import sqlalchemy as sa
from alembic import op

revision = "0007_obs_staging"
down_revision = "0006_chunk_indexes"
branch_labels = None
depends_on = None


def upgrade() -> None:
    big_id = sa.BigInteger().with_variant(sa.Integer, "sqlite")
    op.create_table(
        "obs_staging",
        sa.Column("id", big_id, primary_key=True, autoincrement=True),
        sa.Column("grp", sa.Integer, nullable=False),
        sa.Column("t_min", sa.Float(53), nullable=False),
        sa.Column("t_max", sa.Float(53), nullable=False),
        sa.Column("n_messages", sa.Integer, nullable=False),
        sa.Column("n_obs", sa.Integer, nullable=False),
        sa.Column("n_derived", sa.Integer, nullable=False),
        sa.Column("mid_max", sa.BigInteger),
        sa.Column("seq_max", sa.BigInteger),
        sa.Column("data", sa.LargeBinary, nullable=False))


def downgrade() -> None:
    raise NotImplementedError("hemostream databases are upgraded one way only")
