"""People, not token labels: who a token belongs to, who signed a version, which token did
what; token expiry and last use.

api_token gains the staff identifier of the person a clinician token belongs to (a system
client's token has none), an optional expiry and the time it was last used. note_version
gains the token that stored it and, for a signed version, who signed it and when.
audit_entry gains the token id (labels may repeat; ids do not) and a detail (the resources
read or the search asked for; identifiers only).

Revision ID: 0004
Revises: 0003
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

S = AutoString


def upgrade() -> None:
    with op.batch_alter_table("api_token") as batch:
        batch.add_column(sa.Column("staff_system", S(length=255), nullable=True))
        batch.add_column(sa.Column("staff_value", S(length=64), nullable=True))
        batch.add_column(sa.Column("expires_at", sa.DateTime(timezone=True), nullable=True))
        batch.add_column(sa.Column("last_used_at", sa.DateTime(timezone=True), nullable=True))
    with op.batch_alter_table("note_version") as batch:
        batch.add_column(sa.Column("recorded_by_token", sa.Integer(), nullable=True))
        batch.add_column(sa.Column("signed_by", S(length=200), nullable=True))
        batch.add_column(sa.Column("signed_by_staff", S(length=320), nullable=True))
        batch.add_column(sa.Column("signed_at", sa.DateTime(timezone=True), nullable=True))
    with op.batch_alter_table("audit_entry") as batch:
        batch.add_column(sa.Column("token_id", sa.Integer(), nullable=True))
        batch.add_column(sa.Column("detail", S(length=500), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("audit_entry") as batch:
        batch.drop_column("detail")
        batch.drop_column("token_id")
    with op.batch_alter_table("note_version") as batch:
        for name in ("signed_at", "signed_by_staff", "signed_by", "recorded_by_token"):
            batch.drop_column(name)
    with op.batch_alter_table("api_token") as batch:
        for name in ("last_used_at", "expires_at", "staff_value", "staff_system"):
            batch.drop_column(name)
