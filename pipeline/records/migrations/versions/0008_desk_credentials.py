"""A desk account's password and sealed key after a change or a reset: ``desk_credentials``.

``desk_users`` is written once, so a new password (the person's own change, or one an
administrator sets) is a new row here; the latest row of an account is in force. A record table
from the start: ``row_sha256``, named by its transaction's ``records-written`` event, UPDATE and
DELETE refused by triggers.

Revision ID: 0008_desk_credentials
Revises: 0007_more_record_tables
"""

import sqlalchemy as sa
from alembic import op

from pipeline.records import append_only

revision = "0008_desk_credentials"
down_revision = "0007_more_record_tables"
branch_labels = None
depends_on = None

TABLES = ("desk_credentials",)


def upgrade() -> None:
    op.create_table(
        "desk_credentials",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("user_id", sa.Integer, sa.ForeignKey("desk_users.id"), nullable=False),
        sa.Column("kind", sa.String(20), nullable=False),
        sa.Column("password_hash", sa.String(200), nullable=False),
        sa.Column("key_file", sa.String(200), nullable=True),
        sa.Column("key_sha256", sa.String(64), nullable=True),
        sa.Column("signer_certificate_sha256", sa.String(64), nullable=True),
        sa.Column("set_at_utc", sa.DateTime(timezone=True), nullable=False),
        sa.Column("set_by", sa.String(120), nullable=False),
        sa.Column("row_sha256", sa.String(64), nullable=True),
    )
    op.create_index("ix_desk_credentials_user_id", "desk_credentials", ["user_id"])
    append_only.create_triggers(op.get_bind(), TABLES)


def downgrade() -> None:
    append_only.drop_triggers(op.get_bind(), TABLES)
    op.drop_index("ix_desk_credentials_user_id", "desk_credentials")
    op.drop_table("desk_credentials")
