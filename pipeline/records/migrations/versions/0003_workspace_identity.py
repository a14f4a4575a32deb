"""Each night records the identity of the workspace it belongs to.

Nights stored before have none (NULL): they belong to whichever workspace used the store then.

Revision ID: 0003
Revises: 0002
"""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("night_runs") as batch:
        batch.add_column(sa.Column("workspace_id", sa.String(32), nullable=True))
        batch.create_index("ix_night_runs_workspace_id", ["workspace_id"])


def downgrade() -> None:
    with op.batch_alter_table("night_runs") as batch:
        batch.drop_index("ix_night_runs_workspace_id")
        batch.drop_column("workspace_id")
