"""The schema of release 0.1.0 (before versioning): one row per observation.

Databases made by that release carry no version table; hemostream recognises them (an
``observations`` table and no ``config_snapshots``) and stamps them at this revision before
upgrading. Nothing to do here.

Revision ID: 0001
Revises:
"""

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    pass


def downgrade() -> None:
    pass
