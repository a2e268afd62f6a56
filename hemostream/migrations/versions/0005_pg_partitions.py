"""PostgreSQL only: ``obs_chunks`` partitioned by day (native declarative partitioning).

The table becomes ``PARTITION BY RANGE (t_min)`` with one partition per UTC day, every row
and the id sequence kept (:func:`hemostream.store.pg.partition`); pruning then drops whole
partitions. SQLite is left as it is (the revision is only recorded). One way only.

Revision ID: 0005_pg_partitions
Revises: 0004_worker_leases
"""

from alembic import op

revision = "0005_pg_partitions"
down_revision = "0004_worker_leases"
branch_labels = None
depends_on = None


def upgrade() -> None:
    conn = op.get_bind()
    if conn.dialect.name != "postgresql":
        return
    from hemostream.store.pg import partition

    partition(conn)


def downgrade() -> None:
    raise NotImplementedError("hemostream databases are upgraded one way only")
