"""Records nobody rewrites unseen: row hashes, append-only tables, statuses as new rows.

- Every record table gets ``row_sha256`` (see ``pipeline/records/row_hashes.py``).
- What used to be changed in place becomes a new row or a query: a night's end and counts go to
  ``night_closings``; a decision's LIMS export to ``lims_exports``; "superseded by" is the lot's
  next revision and the active limits are the chart's highest version (both found by query).
  Existing values are carried over before the old columns are dropped.
- Rows stored before this revision are hashed here and named in one ``records-written`` audit
  event chained after the existing ones (``"sealed_by_migration": "0004"``).
- Triggers refuse UPDATE and DELETE on every record table and on the audit chain.

Revision ID: 0004
Revises: 0003
"""

import datetime as dt

import sqlalchemy as sa
from alembic import op

from pipeline.records import append_only
from pipeline.records.row_hashes import seal_existing_rows

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

TZ = sa.DateTime(timezone=True)
HASHED = ("night_runs", "input_files", "lots", "decisions", "results", "control_limits", "chart_points")
# The record tables as they were at this revision (later revisions add their own): frozen here, so
# that this migration does the same whatever tables later code declares.
SEALED = (*HASHED, "night_closings", "lims_exports")
APPEND_ONLY = (*SEALED, "audit_events")


def upgrade() -> None:
    bind = op.get_bind()
    op.create_table(
        "night_closings",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("night_id", sa.Integer, sa.ForeignKey("night_runs.id"), nullable=False, unique=True),
        sa.Column("closed_at_utc", TZ, nullable=False),
        sa.Column("how", sa.String(20), nullable=False),
        sa.Column("files_received", sa.Integer, nullable=True),
        sa.Column("files_archived", sa.Integer, nullable=True),
        sa.Column("files_quarantined", sa.Integer, nullable=True),
        sa.Column("lots_decided", sa.Integer, nullable=True),
        sa.Column("row_sha256", sa.String(64), nullable=True),
    )
    op.create_table(
        "lims_exports",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("decision_id", sa.Integer, sa.ForeignKey("decisions.id"), nullable=False, unique=True),
        sa.Column("export_name", sa.String(120), nullable=False),
        sa.Column("exported_at_utc", TZ, nullable=False),
        sa.Column("row_sha256", sa.String(64), nullable=True),
    )
    now = dt.datetime.now(dt.UTC)
    bind.execute(sa.text(
        "INSERT INTO night_closings (night_id, closed_at_utc, how, files_received, files_archived, files_quarantined, "
        "lots_decided) SELECT id, finished_at_utc, 'closed', files_received, files_archived, files_quarantined, "
        "lots_decided FROM night_runs WHERE finished_at_utc IS NOT NULL ORDER BY id"))
    bind.execute(sa.text("INSERT INTO lims_exports (decision_id, export_name, exported_at_utc) "
                         "SELECT id, lims_export, :now FROM decisions WHERE lims_export IS NOT NULL ORDER BY id"),
                 {"now": now})
    with op.batch_alter_table("night_runs") as batch:
        for column in ("finished_at_utc", "files_received", "files_archived", "files_quarantined", "lots_decided"):
            batch.drop_column(column)
    with op.batch_alter_table("decisions") as batch:
        batch.drop_column("superseded_by")
        batch.drop_column("lims_export")
    with op.batch_alter_table("control_limits") as batch:
        batch.drop_column("active")
    for table in HASHED:
        with op.batch_alter_table(table) as batch:
            batch.add_column(sa.Column("row_sha256", sa.String(64), nullable=True))
    seal_existing_rows(bind, SEALED, now, "0004")
    append_only.create_triggers(bind, APPEND_ONLY)


def downgrade() -> None:
    bind = op.get_bind()
    append_only.drop_triggers(bind, APPEND_ONLY)
    for table in HASHED:
        with op.batch_alter_table(table) as batch:
            batch.drop_column("row_sha256")
    with op.batch_alter_table("control_limits") as batch:
        batch.add_column(sa.Column("active", sa.Integer, nullable=False, server_default="1"))
    with op.batch_alter_table("decisions") as batch:
        batch.add_column(sa.Column("superseded_by", sa.Integer, nullable=True))
        batch.add_column(sa.Column("lims_export", sa.String(120), nullable=True))
    with op.batch_alter_table("night_runs") as batch:
        batch.add_column(sa.Column("finished_at_utc", TZ, nullable=True))
        for column in ("files_received", "files_archived", "files_quarantined", "lots_decided"):
            batch.add_column(sa.Column(column, sa.Integer, nullable=False, server_default="0"))
    op.drop_table("lims_exports")
    op.drop_table("night_closings")
