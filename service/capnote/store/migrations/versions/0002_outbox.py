"""Outbox for forwarding Bundles to the hospital's FHIR server.

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

S = AutoString


def upgrade() -> None:
    op.create_table(
        "outbox_entry",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("note_key", S(length=36), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("state", S(length=10), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("next_attempt_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("claimed_by", S(length=64), nullable=True),
        sa.Column("claimed_until", sa.DateTime(timezone=True), nullable=True),
        sa.Column("last_status", sa.Integer(), nullable=True),
        sa.Column("last_error", sa.Text(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("delivered_at", sa.DateTime(timezone=True), nullable=True),
        sa.UniqueConstraint("note_key", "version", name="uq_outbox_note_version"),
    )
    op.create_index("ix_outbox_due", "outbox_entry", ["state", "next_attempt_at"])


def downgrade() -> None:
    op.drop_table("outbox_entry")
