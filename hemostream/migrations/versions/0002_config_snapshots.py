"""The configurations in force, kept with the data (``config_snapshots``).

Revision ID: 0002
Revises: 0001
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    if sa.inspect(op.get_bind()).has_table("config_snapshots"):
        return
    big = sa.BigInteger().with_variant(sa.Integer, "sqlite")
    op.create_table(
        "config_snapshots",
        sa.Column("id", big, primary_key=True, autoincrement=True),
        sa.Column("time", sa.Float(53), nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False),
        sa.Column("config", sa.Text, nullable=False))
    op.create_index("ix_config_snapshots_time", "config_snapshots", ["time"])


def downgrade() -> None:
    op.drop_index("ix_config_snapshots_time", "config_snapshots")
    op.drop_table("config_snapshots")
