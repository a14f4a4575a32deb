"""The lot record's and the desk's tables become record tables: row hashes and append-only.

``lot_results``, ``investigations`` and ``document_status`` (0005) and ``desk_users`` and
``desk_account_events`` (0006) were written append-only by the code; from here each row carries
``row_sha256``, is named by its transaction's ``records-written`` audit event, and the database
refuses UPDATE and DELETE on them (as 0004 did for the first record tables). Rows stored before
this revision are hashed here and named in one chained event (``"sealed_by_migration": "0007"``).

Revision ID: 0007_more_record_tables
Revises: 0006_desk_users
"""

import datetime as dt

import sqlalchemy as sa
from alembic import op

from pipeline.records import append_only
from pipeline.records.row_hashes import seal_existing_rows

revision = "0007_more_record_tables"
down_revision = "0006_desk_users"
branch_labels = None
depends_on = None

TABLES = ("lot_results", "investigations", "document_status", "desk_users", "desk_account_events")


def upgrade() -> None:
    bind = op.get_bind()
    for table in TABLES:
        with op.batch_alter_table(table) as batch:
            batch.add_column(sa.Column("row_sha256", sa.String(64), nullable=True))
    seal_existing_rows(bind, TABLES, dt.datetime.now(dt.UTC), "0007")
    append_only.create_triggers(bind, TABLES)


def downgrade() -> None:
    bind = op.get_bind()
    append_only.drop_triggers(bind, TABLES)
    for table in TABLES:
        with op.batch_alter_table(table) as batch:
            batch.drop_column("row_sha256")
