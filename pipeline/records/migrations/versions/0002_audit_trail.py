"""Audit trail in the store (hash-chained events) and the LIMS export mark on decisions.

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
    op.create_table(
        "audit_events",
        sa.Column("seq", sa.Integer, primary_key=True, autoincrement=False),
        sa.Column("time_utc", sa.String(32), nullable=False),
        sa.Column("kind", sa.String(40), nullable=False, index=True),
        sa.Column("lot_id", sa.String(40), nullable=True, index=True),
        sa.Column("body", sa.Text, nullable=False),
        sa.Column("prev_hash", sa.String(64), nullable=False),
        sa.Column("hash", sa.String(64), nullable=False, unique=True),
    )
    with op.batch_alter_table("decisions") as batch:
        batch.add_column(sa.Column("lims_export", sa.String(120), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("decisions") as batch:
        batch.drop_column("lims_export")
    op.drop_table("audit_events")
