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

from pipeline.records import append_only, ledger, row_hashes
from pipeline.records.tables import APPEND_ONLY_TABLES, RECORD_TABLES

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

TZ = sa.DateTime(timezone=True)
HASHED = ("night_runs", "input_files", "lots", "decisions", "results", "control_limits", "chart_points")


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
    _seal_existing_rows(bind, now)
    append_only.create_triggers(bind, APPEND_ONLY_TABLES)


def _seal_existing_rows(bind: sa.Connection, now: dt.datetime) -> None:
    """Hash the rows already stored and name them in one chained audit event."""
    refs = []
    for model in RECORD_TABLES:
        table = model.__table__
        key = row_hashes.primary_key(table)
        for row in bind.execute(sa.select(table).order_by(table.c[key])).mappings().all():
            sha = row_hashes.row_sha256(table, dict(row))
            bind.execute(sa.update(table).where(table.c[key] == row[key]).values(row_sha256=sha))
            refs.append(row_hashes.row_ref(table, row[key], sha))
    if not refs:
        return
    last = bind.execute(sa.text("SELECT seq, hash FROM audit_events ORDER BY seq DESC LIMIT 1")).first()
    (record,) = ledger.chain([{"kind": row_hashes.ROWS_EVENT, "time_utc": now.isoformat(timespec="milliseconds"),
                               "sealed_by_migration": "0004", "rows": refs}],
                             prev_hash=last.hash if last else ledger.GENESIS, start_seq=(last.seq + 1) if last else 1)
    bind.execute(sa.text("INSERT INTO audit_events (seq, time_utc, kind, lot_id, body, prev_hash, hash) "
                         "VALUES (:seq, :time_utc, :kind, NULL, :body, :prev_hash, :hash)"),
                 {"seq": record["seq"], "time_utc": record["time_utc"], "kind": record["kind"],
                  "body": ledger.canonical_json(record), "prev_hash": record["prev_hash"], "hash": record["hash"]})


def downgrade() -> None:
    bind = op.get_bind()
    append_only.drop_triggers(bind, APPEND_ONLY_TABLES)
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
