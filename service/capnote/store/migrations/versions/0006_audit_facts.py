"""Add the facts the clinical audit counts to note_version, and fill them for stored rows.

unit (site, site_name), clinician (performer, performer_name), highest IOP rise grade,
glaucoma as recorded, prophylaxis given, days from cataract surgery: copied out of each
version's note_json and result_json (the derived values) so that `capnote audit` is SQL
aggregation on both engines. The extraction is a copy of capnote.audit.facts as written with
this migration, reading the stored JSON, so later changes there cannot change what it does.

Revision ID: 0006
Revises: 0005
"""

from __future__ import annotations

from typing import Any

import orjson
import sqlalchemy as sa
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None

S = AutoString
_SHAPES: tuple[tuple[str, Any], ...] = (
    ("site", S(length=255)),
    ("site_name", S(length=200)),
    ("performer", S(length=320)),
    ("performer_name", S(length=200)),
    ("spike_grade", S(length=8)),
    ("glaucoma", S(length=10)),
    ("prophylaxis", sa.Boolean()),
    ("cataract_days", sa.Integer()),
)


def facts(note: dict[str, Any], result: dict[str, Any]) -> dict[str, Any] | None:
    """The audit columns from a stored note and its derived values; None for a version that
    has none (a draft kept as typed, a void without a Bundle)."""
    derived = result.get("derived")
    if not isinstance(derived, dict):
        return None
    location = note.get("location") or {}
    performer = note.get("performer") or {}
    ident = performer.get("identifier") or {}
    iop = derived.get("iop") or {}
    risk = (note.get("before") or {}).get("risk_factors") or {}
    return {
        "site": (location.get("identifier") or {}).get("value") or location.get("name"),
        "site_name": location.get("name"),
        "performer": f"{ident.get('system')}|{ident.get('value')}" if ident else None,
        "performer_name": performer.get("name"),
        "spike_grade": iop.get("spike_grade") if iop.get("highest") is not None else None,
        "glaucoma": risk.get("glaucoma"),
        "prophylaxis": bool((note.get("plan") or {}).get("prophylaxis")),
        "cataract_days": derived.get("days_since_cataract_surgery"),
    }


def upgrade() -> None:
    with op.batch_alter_table("note_version") as batch:
        for name, kind in _SHAPES:
            batch.add_column(sa.Column(name, kind, nullable=True))
    connection = op.get_bind()
    note = sa.table(
        "note_version",
        sa.column("id", sa.Integer()),
        sa.column("note_json", sa.Text()),
        sa.column("result_json", sa.Text()),
        *(sa.column(name, kind) for name, kind in _SHAPES),
    )
    fill = (
        sa.update(note)
        .where(note.c.id == sa.bindparam("row_id"))
        .values({name: sa.bindparam(name) for name, _ in _SHAPES})
    )
    last_id = 0
    while True:  # in batches, so a large store converts in bounded memory
        rows = connection.execute(
            sa.select(note.c.id, note.c.note_json, note.c.result_json)
            .where(note.c.id > last_id)
            .order_by(note.c.id)
            .limit(500)
        ).all()
        if not rows:
            return
        changes = []
        for row_id, note_json, result_json in rows:
            found = facts(orjson.loads(note_json), orjson.loads(result_json))
            if found is not None:
                changes.append({"row_id": row_id, **found})
        if changes:
            connection.execute(fill, changes)
        last_id = rows[-1][0]


def downgrade() -> None:
    with op.batch_alter_table("note_version") as batch:
        for name, _ in reversed(_SHAPES):
            batch.drop_column(name)
