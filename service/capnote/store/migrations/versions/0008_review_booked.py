"""Add note_version.review_booked (a review visit among the due items) and fill it for
stored rows from each version's due items (result_json), so that the clinical audit counts
reviews attended against reviews booked, and a withdrawn review request is not booked.

Revision ID: 0008
Revises: 0007
"""

from __future__ import annotations

from typing import Any

import orjson
import sqlalchemy as sa
from alembic import op

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None


def booked(result: dict[str, Any]) -> bool | None:
    """Whether the version's due items hold a review; None for a version without derived
    values (a draft kept as typed)."""
    if not isinstance(result.get("derived"), dict):
        return None
    return any(isinstance(d, dict) and d.get("kind") == "review" for d in result.get("due") or ())


def upgrade() -> None:
    with op.batch_alter_table("note_version") as batch:
        batch.add_column(sa.Column("review_booked", sa.Boolean(), nullable=True))
    connection = op.get_bind()
    note = sa.table(
        "note_version",
        sa.column("id", sa.Integer()),
        sa.column("result_json", sa.Text()),
        sa.column("review_booked", sa.Boolean()),
    )
    fill = (
        sa.update(note)
        .where(note.c.id == sa.bindparam("row_id"))
        .values(review_booked=sa.bindparam("booked"))
    )
    last_id = 0
    while True:  # in batches, so a large store converts in bounded memory
        rows = connection.execute(
            sa.select(note.c.id, note.c.result_json)
            .where(note.c.id > last_id)
            .order_by(note.c.id)
            .limit(500)
        ).all()
        if not rows:
            return
        changes = [
            {"row_id": row_id, "booked": found}
            for row_id, result_json in rows
            if (found := booked(orjson.loads(result_json))) is not None
        ]
        if changes:
            connection.execute(fill, changes)
        last_id = rows[-1][0]


def downgrade() -> None:
    with op.batch_alter_table("note_version") as batch:
        batch.drop_column("review_booked")
