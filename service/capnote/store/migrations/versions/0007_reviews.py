"""Add review_version: the review visit records (capnote.review) and their versions.

Revision ID: 0007
Revises: 0006
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None

S = AutoString


def upgrade() -> None:
    op.create_table(
        "review_version",
        sa.Column("id", sa.Integer(), primary_key=True),
        sa.Column("review_key", S(length=36), nullable=False),
        sa.Column("version", sa.Integer(), nullable=False),
        sa.Column("session_key", S(length=36), nullable=False),
        sa.Column("sender_system", S(length=255), nullable=False),
        sa.Column("sender_value", S(length=64), nullable=False),
        sa.Column("patient_system", S(length=255), nullable=False),
        sa.Column("patient_value", S(length=64), nullable=False),
        sa.Column("eye", S(length=5), nullable=False),
        sa.Column("seen_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("status", S(length=8), nullable=False),
        sa.Column("attended", sa.Boolean(), nullable=False),
        sa.Column("content_hash", S(length=64), nullable=False),
        sa.Column("review_json", sa.Text(), nullable=False),
        sa.Column("result_json", sa.Text(), nullable=False),
        sa.Column("bundle", sa.LargeBinary(), nullable=False),
        sa.Column("roles", sa.Text(), nullable=False),
        sa.Column("reason", S(length=500), nullable=True),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("recorded_by", S(length=100), nullable=False),
        sa.Column("recorded_by_token", sa.Integer(), nullable=True),
        sa.Column("cystoid_macular_oedema", sa.Boolean(), nullable=True),
        sa.Column("retinal_detachment", sa.Boolean(), nullable=True),
        sa.Column("anterior_uveitis", sa.Boolean(), nullable=True),
        sa.Column("raised_iop", sa.Boolean(), nullable=True),
        sa.Column("iol_pits", sa.Boolean(), nullable=True),
        sa.Column("retreatment", sa.Boolean(), nullable=True),
        sa.Column("opening_adequate", sa.Boolean(), nullable=True),
        sa.UniqueConstraint("review_key", "version", name="uq_review_version"),
    )
    op.create_index("ix_review_version_session", "review_version", ["session_key"])


def downgrade() -> None:
    op.drop_index("ix_review_version_session", table_name="review_version")
    op.drop_table("review_version")
