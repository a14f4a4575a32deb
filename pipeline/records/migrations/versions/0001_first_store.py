"""The first store: nights, input files, lots, decisions, results, control limits, chart points.

Revision ID: 0001
Revises:
"""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

TZ = sa.DateTime(timezone=True)


def upgrade() -> None:
    op.create_table(
        "night_runs",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("started_at_utc", TZ, nullable=False),
        sa.Column("finished_at_utc", TZ, nullable=True),
        sa.Column("code_version", sa.String(40), nullable=False),
        sa.Column("files_received", sa.Integer, nullable=False, server_default="0"),
        sa.Column("files_archived", sa.Integer, nullable=False, server_default="0"),
        sa.Column("files_quarantined", sa.Integer, nullable=False, server_default="0"),
        sa.Column("lots_decided", sa.Integer, nullable=False, server_default="0"),
    )
    op.create_table(
        "input_files",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("night_id", sa.Integer, sa.ForeignKey("night_runs.id"), nullable=False),
        sa.Column("file_name", sa.String(255), nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False, index=True),
        sa.Column("kind", sa.String(40), nullable=True),
        sa.Column("layout_version", sa.String(20), nullable=True),
        sa.Column("status", sa.String(20), nullable=False),
        sa.Column("reason", sa.Text, nullable=True),
        sa.Column("stored_as", sa.String(400), nullable=False),
        sa.Column("received_at_utc", TZ, nullable=False),
    )
    op.create_table(
        "lots",
        sa.Column("lot_id", sa.String(40), primary_key=True),
        sa.Column("product_code", sa.String(20), nullable=False, index=True),
        sa.Column("manufactured_on", sa.String(10), nullable=True),
        sa.Column("first_seen_utc", TZ, nullable=False),
    )
    op.create_table(
        "decisions",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("lot_id", sa.String(40), sa.ForeignKey("lots.lot_id"), nullable=False, index=True),
        sa.Column("revision", sa.Integer, nullable=False),
        sa.Column("night_id", sa.Integer, sa.ForeignKey("night_runs.id"), nullable=True),
        sa.Column("disposition", sa.String(20), nullable=False),
        sa.Column("hold_categories", sa.JSON, nullable=False),
        sa.Column("reasons", sa.JSON, nullable=False),
        sa.Column("spec_version", sa.String(20), nullable=False),
        sa.Column("spec_sha256", sa.String(64), nullable=False),
        sa.Column("fingerprint", sa.String(64), nullable=False, unique=True),
        sa.Column("decided_by", sa.String(120), nullable=False),
        sa.Column("change_note", sa.Text, nullable=True),
        sa.Column("decided_at_utc", TZ, nullable=False),
        sa.Column("record", sa.JSON, nullable=False),
        sa.Column("superseded_by", sa.Integer, sa.ForeignKey("decisions.id"), nullable=True),
        sa.UniqueConstraint("lot_id", "revision"),
    )
    op.create_table(
        "results",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("decision_id", sa.Integer, sa.ForeignKey("decisions.id"), nullable=False, index=True),
        sa.Column("attribute", sa.String(40), nullable=False),
        sa.Column("value", sa.Float, nullable=True),
        sa.Column("value_text", sa.String(80), nullable=True),
        sa.Column("se", sa.Float, nullable=True),
        sa.Column("unit", sa.String(20), nullable=False),
        sa.Column("reported", sa.String(40), nullable=True),
        sa.Column("verdict", sa.String(20), nullable=False),
    )
    op.create_table(
        "control_limits",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("product_code", sa.String(20), nullable=False),
        sa.Column("attribute", sa.String(40), nullable=False),
        sa.Column("version", sa.Integer, nullable=False),
        sa.Column("center", sa.Float, nullable=False),
        sa.Column("sigma", sa.Float, nullable=False),
        sa.Column("mr_bar", sa.Float, nullable=False),
        sa.Column("baseline_n", sa.Integer, nullable=False),
        sa.Column("baseline_lots", sa.JSON, nullable=False),
        sa.Column("frozen_at_utc", TZ, nullable=False),
        sa.Column("frozen_by", sa.String(120), nullable=False),
        sa.Column("reason", sa.Text, nullable=False),
        sa.Column("active", sa.Integer, nullable=False, server_default="1"),
        sa.UniqueConstraint("product_code", "attribute", "version"),
    )
    op.create_table(
        "chart_points",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("product_code", sa.String(20), nullable=False, index=True),
        sa.Column("attribute", sa.String(40), nullable=False),
        sa.Column("lot_id", sa.String(40), nullable=False),
        sa.Column("value", sa.Float, nullable=False),
        sa.Column("decision_id", sa.Integer, sa.ForeignKey("decisions.id"), nullable=False),
        sa.UniqueConstraint("product_code", "attribute", "lot_id"),
    )


def downgrade() -> None:
    for table in ("chart_points", "control_limits", "results", "decisions", "lots", "input_files", "night_runs"):
        op.drop_table(table)
