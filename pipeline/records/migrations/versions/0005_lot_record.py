"""The lot record: results across nights with their standing, investigation outcomes, documents' status.

Every table is append-only: a result superseded or invalidated gets a new row naming it.

Revision ID: 0005_lot_record
Revises: 0003
"""

import sqlalchemy as sa
from alembic import op

revision = "0005_lot_record"
down_revision = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "lot_results",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("lot_id", sa.String(40), nullable=False),
        sa.Column("attribute", sa.String(40), nullable=False),
        sa.Column("status", sa.String(20), nullable=False),
        sa.Column("replaces", sa.Integer, sa.ForeignKey("lot_results.id"), nullable=True),
        sa.Column("night_id", sa.Integer, sa.ForeignKey("night_runs.id"), nullable=True),
        sa.Column("decision_id", sa.Integer, sa.ForeignKey("decisions.id"), nullable=True),
        sa.Column("verdict", sa.String(20), nullable=True),
        sa.Column("value", sa.Float, nullable=True),
        sa.Column("value_text", sa.String(80), nullable=True),
        sa.Column("reported", sa.String(40), nullable=True),
        sa.Column("unit", sa.String(20), nullable=True),
        sa.Column("se", sa.Float, nullable=True),
        sa.Column("tested_on", sa.String(10), nullable=True),
        sa.Column("source", sa.String(120), nullable=True),
        sa.Column("method", sa.String(80), nullable=True),
        sa.Column("plate_id", sa.String(40), nullable=True),
        sa.Column("analyst", sa.String(120), nullable=True),
        sa.Column("files", sa.JSON, nullable=True),
        sa.Column("reasons", sa.JSON, nullable=True),
        sa.Column("reference", sa.String(40), nullable=True),
        sa.Column("recorded_by", sa.String(120), nullable=False),
        sa.Column("recorded_at_utc", sa.DateTime(timezone=True), nullable=False),
    )
    op.create_index("ix_lot_results_lot_id", "lot_results", ["lot_id"])
    op.create_index("ix_lot_results_decision_id", "lot_results", ["decision_id"])
    op.create_table(
        "investigations",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("lot_id", sa.String(40), nullable=False),
        sa.Column("attribute", sa.String(40), nullable=False),
        sa.Column("result_id", sa.Integer, sa.ForeignKey("lot_results.id"), nullable=False),
        sa.Column("outcome", sa.String(60), nullable=False),
        sa.Column("reference", sa.String(40), nullable=False),
        sa.Column("reason", sa.Text, nullable=False),
        sa.Column("retest_plan", sa.Text, nullable=False),
        sa.Column("decided_by", sa.String(120), nullable=False),
        sa.Column("signature", sa.JSON, nullable=False),
        sa.Column("recorded_at_utc", sa.DateTime(timezone=True), nullable=False),
    )
    op.create_index("ix_investigations_lot_id", "investigations", ["lot_id"])
    op.create_table(
        "document_status",
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("file", sa.String(255), nullable=False),
        sa.Column("sha256", sa.String(64), nullable=False),
        sa.Column("lot_id", sa.String(40), nullable=False),
        sa.Column("revision", sa.Integer, nullable=False),
        sa.Column("status", sa.String(20), nullable=False),
        sa.Column("superseded_by_revision", sa.Integer, nullable=True),
        sa.Column("reason", sa.Text, nullable=False),
        sa.Column("recorded_at_utc", sa.DateTime(timezone=True), nullable=False),
    )
    op.create_index("ix_document_status_file", "document_status", ["file"])


def downgrade() -> None:
    op.drop_table("document_status")
    op.drop_table("investigations")
    op.drop_table("lot_results")
