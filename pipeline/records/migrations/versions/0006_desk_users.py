"""The reviewer's desk: accounts (written once) and their events (append-only).

Revision ID: 0006_desk_users
Revises: 0003
"""

import sqlalchemy as sa
from alembic import op

revision = "0006_desk_users"
down_revision = "0005_lot_record"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "desk_users",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("login", sa.String(60), nullable=False, unique=True),
        sa.Column("printed_name", sa.String(120), nullable=False),
        sa.Column("role", sa.String(20), nullable=False),
        sa.Column("password_hash", sa.String(200), nullable=False),
        sa.Column("key_file", sa.String(200), nullable=True),
        sa.Column("key_sha256", sa.String(64), nullable=True),
        sa.Column("signer_certificate_sha256", sa.String(64), nullable=True),
        sa.Column("created_at_utc", sa.DateTime(timezone=True), nullable=False),
        sa.Column("created_by", sa.String(120), nullable=False),
    )
    op.create_table(
        "desk_account_events",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("user_id", sa.Integer, sa.ForeignKey("desk_users.id"), nullable=False, index=True),
        sa.Column("kind", sa.String(30), nullable=False),
        sa.Column("at_utc", sa.DateTime(timezone=True), nullable=False),
        sa.Column("detail", sa.Text, nullable=True),
    )


def downgrade() -> None:
    op.drop_table("desk_account_events")
    op.drop_table("desk_users")
