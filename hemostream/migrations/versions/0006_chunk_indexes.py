"""Indexes on ``obs_chunks`` for what the writer and the start-up look up: a bed's open
segments ``(bed_id, sealed)``, the newest message id ``mid_max`` and derived-value sequence
``seq_max``. Without them each lookup reads every chunk row, which on a database of months
(a page or more per chunk) costs more than the writing. Both SQLite and PostgreSQL.

Revision ID: 0006_chunk_indexes
Revises: 0005_pg_partitions
"""

from alembic import op

revision = "0006_chunk_indexes"
down_revision = "0005_pg_partitions"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index("ix_obs_chunks_bed_sealed", "obs_chunks", ["bed_id", "sealed"])
    op.create_index("ix_obs_chunks_mid_max", "obs_chunks", ["mid_max"])
    op.create_index("ix_obs_chunks_seq_max", "obs_chunks", ["seq_max"])


def downgrade() -> None:
    raise NotImplementedError("hemostream databases are upgraded one way only")
