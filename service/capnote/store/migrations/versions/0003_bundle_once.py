"""Keep each version's Bundle once, compressed; a search index instead of resource copies.

note_version.bundle_json (text) becomes note_version.bundle (zstd-compressed JSON) with
note_version.roles (each entry's resource type and role, ``Type/role``, in entry order);
fhir_resource, which held every resource a second time, gives way to fhir_index, which
holds only what the searches filter on. The content digest becomes the SHA-256 of the
stored note JSON.

Existing rows are converted: each entry's role is found by recomputing the stable keys of
the roles a note can have (the names below are those the Bundle builder used when this
migration was written; they are copied here so that later changes to the builder cannot
change what this migration does).

Revision ID: 0003
Revises: 0002
"""

from __future__ import annotations

import hashlib
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

import orjson
import sqlalchemy as sa
import zstandard
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

S = AutoString
_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, "https://capnote.org/fhir")
_FIXED = (
    "procedure",
    "iop-before",
    "acuity-before",
    "acuity-after",
    "total-energy",
    "total-pulses",
    "focal-fluence",
    "cumulative-energy",
    "opening-size",
    "opening-area",
    "iop-change",
    "due-iop-recheck",
    "due-next-day-iop",
    "due-review",
)


def _candidate_roles() -> Iterator[str]:
    yield from _FIXED
    yield from (f"iop-after-{i}" for i in range(20))
    yield from (f"series-{i}" for i in range(50))
    for i in range(10):
        yield from (f"prophylaxis-{i}-{label}" for label in ("before", "after"))
        yield f"take-home-{i}"


def _roles(system: str, value: str, bundle: dict[str, Any]) -> list[str]:
    by_key = {str(uuid.uuid5(_NAMESPACE, f"{system}|{value}|{r}")): r for r in _candidate_roles()}
    return [by_key[e["fullUrl"].removeprefix("urn:uuid:")] for e in bundle["entry"]]


def _search_date(resource: dict[str, Any]) -> datetime | None:
    text = None
    if resource["resourceType"] == "Procedure":
        text = resource.get("performedPeriod", {}).get("start")
    elif resource["resourceType"] == "ServiceRequest":
        text = (resource.get("occurrenceTiming", {}).get("event") or [None])[0]
    if not text:
        return None
    moment = datetime.fromisoformat(text)
    return (moment if moment.tzinfo else moment.replace(tzinfo=UTC)).astimezone(UTC)


def upgrade() -> None:
    with op.batch_alter_table("note_version") as batch:
        batch.add_column(sa.Column("bundle", sa.LargeBinary(), nullable=True))
        batch.add_column(sa.Column("roles", sa.Text(), nullable=True))
        batch.drop_index("ix_note_version_note_key")
    op.create_table(
        "fhir_index",
        sa.Column("note_key", S(length=36), primary_key=True),
        sa.Column("role", S(length=40), primary_key=True),
        sa.Column("version", sa.Integer(), primary_key=True),
        sa.Column("resource_type", S(length=40), nullable=False),
        sa.Column("latest", sa.Boolean(), nullable=False),
        sa.Column("status", S(length=20), nullable=False),
        sa.Column("date", sa.DateTime(timezone=True), nullable=True),
        sqlite_with_rowid=False,
    )
    op.create_index(
        "ix_fhir_index_current",
        "fhir_index",
        ["resource_type", "status", "date"],
        sqlite_where=sa.text("latest"),
        postgresql_where=sa.text("latest"),
    )
    _convert_rows()
    with op.batch_alter_table("note_version") as batch:
        batch.drop_column("bundle_json")
        batch.alter_column("bundle", existing_type=sa.LargeBinary(), nullable=False)
        batch.alter_column("roles", existing_type=sa.Text(), nullable=False)
    op.drop_table("fhir_resource")


def _convert_rows() -> None:
    connection = op.get_bind()
    note = sa.table(
        "note_version",
        sa.column("id", sa.Integer()),
        sa.column("note_key", sa.String()),
        sa.column("version", sa.Integer()),
        sa.column("sender_system", sa.String()),
        sa.column("sender_value", sa.String()),
        sa.column("note_json", sa.Text()),
        sa.column("bundle_json", sa.Text()),
        sa.column("bundle", sa.LargeBinary()),
        sa.column("roles", sa.Text()),
        sa.column("content_hash", sa.String()),
    )
    index = sa.table(
        "fhir_index",
        sa.column("note_key", sa.String()),
        sa.column("role", sa.String()),
        sa.column("version", sa.Integer()),
        sa.column("resource_type", sa.String()),
        sa.column("latest", sa.Boolean()),
        sa.column("status", sa.String()),
        sa.column("date", sa.DateTime(timezone=True)),
    )
    newest = dict(
        connection.execute(
            sa.select(note.c.note_key, sa.func.max(note.c.version)).group_by(note.c.note_key)
        ).all()
    )
    compressor = zstandard.ZstdCompressor(level=1)
    last_id = 0
    while True:  # in batches, so a large store converts in bounded memory
        rows = connection.execute(
            sa.select(
                note.c.id,
                note.c.note_key,
                note.c.version,
                note.c.sender_system,
                note.c.sender_value,
                note.c.note_json,
                note.c.bundle_json,
            )
            .where(note.c.id > last_id)
            .order_by(note.c.id)
            .limit(500)
        ).all()
        if not rows:
            return
        for row_id, key, version, system, value, note_json, bundle_json in rows:
            bundle = orjson.loads(bundle_json)
            roles = _roles(system, value, bundle)
            connection.execute(
                note.update()
                .where(note.c.id == row_id)
                .values(
                    bundle=compressor.compress(bundle_json.encode()),
                    roles=" ".join(
                        f"{e['resource']['resourceType']}/{role}"
                        for e, role in zip(bundle["entry"], roles, strict=True)
                    ),
                    content_hash=hashlib.sha256(note_json.encode()).hexdigest(),
                )
            )
            searchable = [
                {
                    "note_key": key,
                    "role": role,
                    "version": version,
                    "resource_type": entry["resource"]["resourceType"],
                    "latest": version == newest[key],
                    "status": entry["resource"].get("status", ""),
                    "date": _search_date(entry["resource"]),
                }
                for entry, role in zip(bundle["entry"], roles, strict=True)
                if entry["resource"]["resourceType"] in ("Procedure", "ServiceRequest")
            ]
            if searchable:
                connection.execute(index.insert(), searchable)
        last_id = rows[-1][0]


def downgrade() -> None:
    # One way on purpose: the old content digest was computed by the note model of its
    # day, which this file cannot reproduce. Restore the backup taken before upgrading.
    raise RuntimeError("migration 0003 cannot be undone; restore a backup taken before it")
