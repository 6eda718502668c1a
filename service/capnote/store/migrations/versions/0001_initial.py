"""Initial tables: note versions, FHIR read model, tokens, audit trail.

Revision ID: 0001
Revises:
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

S = AutoString


def upgrade() -> None:
    op.create_table(
        "note_version",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("note_key", S(length=36), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("sender_system", S(length=255), nullable=False),
        sa.Column("sender_value", S(length=64), nullable=False),
        sa.Column("patient_system", S(length=255), nullable=False),
        sa.Column("patient_value", S(length=64), nullable=False),
        sa.Column("eye", S(length=5), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("status", S(length=8), nullable=False),
        sa.Column("total_energy_mj", sa.Float(), nullable=True),
        sa.Column("content_hash", S(length=64), nullable=False),
        sa.Column("note_json", sa.Text(), nullable=False),
        sa.Column("result_json", sa.Text(), nullable=False),
        sa.Column("bundle_json", sa.Text(), nullable=False),
        sa.Column("reason", S(length=500), nullable=True),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("recorded_by", S(length=100), nullable=False),
        sa.UniqueConstraint("note_key", "version", name="uq_note_version"),
    )
    op.create_index("ix_note_version_note_key", "note_version", ["note_key"])
    op.create_index(
        "ix_note_version_patient_eye", "note_version", ["patient_system", "patient_value", "eye"]
    )
    op.create_table(
        "fhir_resource",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("resource_type", S(length=40), nullable=False),
        sa.Column("resource_id", S(length=36), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("latest", sa.Boolean(), nullable=False),
        sa.Column("note_key", S(length=36), nullable=False),
        sa.Column("patient_system", S(length=255), nullable=False),
        sa.Column("patient_value", S(length=64), nullable=False),
        sa.Column("status", S(length=20), nullable=False),
        sa.Column("date", sa.DateTime(timezone=True), nullable=True),
        sa.Column("body", sa.Text(), nullable=False),
        sa.UniqueConstraint("resource_type", "resource_id", "version", name="uq_fhir_resource"),
    )
    op.create_index("ix_fhir_resource_note_key", "fhir_resource", ["note_key"])
    op.create_index(
        "ix_fhir_resource_patient",
        "fhir_resource",
        ["resource_type", "patient_system", "patient_value"],
    )
    op.create_index(
        "ix_fhir_resource_status_date", "fhir_resource", ["resource_type", "status", "date"]
    )
    op.create_table(
        "api_token",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("token_hash", S(length=64), nullable=False, unique=True),
        sa.Column("role", S(length=20), nullable=False),
        sa.Column("label", S(length=100), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
    )
    op.create_table(
        "audit_entry",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("actor", S(length=100), nullable=False),
        sa.Column("role", S(length=20), nullable=False),
        sa.Column("action", S(length=40), nullable=False),
        sa.Column("note_key", S(length=36), nullable=True),
        sa.Column("version", sa.Integer(), nullable=True),
        sa.Column("remote", S(length=64), nullable=True),
        sa.Column("outcome", S(length=20), nullable=False),
    )
    op.create_index("ix_audit_entry_at", "audit_entry", ["at"])
    op.create_index("ix_audit_entry_note_key", "audit_entry", ["note_key"])


def downgrade() -> None:
    for table in ("audit_entry", "api_token", "fhir_resource", "note_version"):
        op.drop_table(table)
