"""Unit leases of several workers sharing one PostgreSQL database (docs/workers.md).

``worker_leases``: one row per unit, its owner, fencing token and lease times;
``worker_members``: the running workers; the sequence ``worker_lease_tokens`` hands out the
fencing tokens (PostgreSQL only: workers need PostgreSQL, a SQLite file gets the tables but
no sequence). New tables only, so the downgrade drops them.

Revision ID: 0004_worker_leases
Revises: 0003
"""

import sqlalchemy as sa
from alembic import op

revision = "0004_worker_leases"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "worker_leases",
        sa.Column("unit", sa.String(32), primary_key=True),
        sa.Column("owner", sa.String(128), nullable=False),
        sa.Column("token", sa.BigInteger, nullable=False),
        sa.Column("since", sa.Float(53), nullable=False),
        sa.Column("renewed", sa.Float(53), nullable=False),
        sa.Column("expires", sa.Float(53), nullable=False),
        sa.Column("lag_s", sa.Float(53)),
        sa.Column("stored_at", sa.Float(53)))
    op.create_table(
        "worker_members",
        sa.Column("name", sa.String(128), primary_key=True),
        sa.Column("started", sa.Float(53), nullable=False),
        sa.Column("seen", sa.Float(53), nullable=False),
        sa.Column("expires", sa.Float(53), nullable=False))
    if op.get_bind().dialect.name == "postgresql":
        op.execute(sa.schema.CreateSequence(sa.Sequence("worker_lease_tokens")))


def downgrade() -> None:
    if op.get_bind().dialect.name == "postgresql":
        op.execute(sa.schema.DropSequence(sa.Sequence("worker_lease_tokens")))
    op.drop_table("worker_members")
    op.drop_table("worker_leases")
