"""Index every served resource type for the FHIR searches, with date ranges and tokens.

fhir_index gains the end of each resource's date range (date_end) and the time results are
ordered by (sort_at, never NULL, for keyset paging), and covers Observation,
MedicationAdministration and MedicationRequest besides Procedure and ServiceRequest;
fhir_token holds each resource's identifiers and the codings of its code.

The index is rebuilt from the latest version of every note (searches read only the current
rows). The extraction below is a copy of what capnote.fhir.readmodel did when this migration
was written, so that later changes there cannot change what this migration does.

Revision ID: 0005
Revises: 0004
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import orjson
import sqlalchemy as sa
import zstandard
from alembic import op
from sqlmodel.sql.sqltypes import AutoString

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

S = AutoString
_NO_DATE = datetime(1, 1, 1, tzinfo=UTC)
_DATE_ELEMENT = {
    "Procedure": "performed",
    "Observation": "effective",
    "ServiceRequest": "occurrence",
    "MedicationAdministration": "effective",
    "MedicationRequest": "authoredOn",
}
_CODE_ELEMENT = {
    "Procedure": "code",
    "Observation": "code",
    "ServiceRequest": "code",
    "MedicationAdministration": "medicationCodeableConcept",
    "MedicationRequest": "medicationCodeableConcept",
}


def _moment(text: str, *, last: bool) -> datetime:
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
        if last and "T" not in text:
            moment += timedelta(days=1) - timedelta(microseconds=1)
    return moment.astimezone(UTC)


def _range(resource: dict[str, Any]) -> tuple[datetime | None, datetime | None]:
    element = _DATE_ELEMENT[resource["resourceType"]]
    start = end = None
    if element == "authoredOn":
        start = end = resource.get("authoredOn")
    elif f"{element}DateTime" in resource:
        start = end = resource[f"{element}DateTime"]
    elif f"{element}Period" in resource:
        period = resource[f"{element}Period"]
        start, end = period.get("start"), period.get("end") or period.get("start")
    elif f"{element}Timing" in resource:
        start = end = (resource[f"{element}Timing"].get("event") or [None])[0]
    if not start or not end:
        return None, None
    return _moment(start, last=False), _moment(end, last=True)


def _tokens(resource: dict[str, Any]) -> list[tuple[str, str, str]]:
    found = [
        ("identifier", i.get("system", ""), i["value"])
        for i in resource.get("identifier") or ()
        if i.get("value")
    ]
    concept = resource.get(_CODE_ELEMENT[resource["resourceType"]]) or {}
    found += [
        ("code", c.get("system", ""), c["code"])
        for c in concept.get("coding") or ()
        if c.get("code")
    ]
    return list(dict.fromkeys(found))


def upgrade() -> None:
    op.drop_index("ix_fhir_index_current", table_name="fhir_index")
    op.drop_table("fhir_index")
    op.create_table(
        "fhir_index",
        sa.Column("note_key", S(length=36), primary_key=True),
        sa.Column("role", S(length=40), primary_key=True),
        sa.Column("version", sa.Integer(), primary_key=True),
        sa.Column("resource_type", S(length=40), nullable=False),
        sa.Column("latest", sa.Boolean(), nullable=False),
        sa.Column("status", S(length=20), nullable=False),
        sa.Column("date", sa.DateTime(timezone=True), nullable=True),
        sa.Column("date_end", sa.DateTime(timezone=True), nullable=True),
        sa.Column("sort_at", sa.DateTime(timezone=True), nullable=False),
        sqlite_with_rowid=False,
    )
    op.create_index(
        "ix_fhir_index_current",
        "fhir_index",
        ["resource_type", "status", "date"],
        sqlite_where=sa.text("latest"),
        postgresql_where=sa.text("latest"),
    )
    op.create_table(
        "fhir_token",
        sa.Column("param", S(length=20), primary_key=True),
        sa.Column("code", S(length=255), primary_key=True),
        sa.Column("note_key", S(length=36), primary_key=True),
        sa.Column("version", sa.Integer(), primary_key=True),
        sa.Column("role", S(length=40), primary_key=True),
        sa.Column("system", S(length=255), primary_key=True),
        sqlite_with_rowid=False,
    )
    _index_latest_versions()


def _index_latest_versions() -> None:
    connection = op.get_bind()
    note = sa.table(
        "note_version",
        sa.column("id", sa.Integer()),
        sa.column("note_key", sa.String()),
        sa.column("version", sa.Integer()),
        sa.column("bundle", sa.LargeBinary()),
        sa.column("roles", sa.Text()),
    )
    index = sa.table(
        "fhir_index",
        *(sa.column(n, sa.String()) for n in ("note_key", "role", "resource_type", "status")),
        sa.column("version", sa.Integer()),
        sa.column("latest", sa.Boolean()),
        *(sa.column(n, sa.DateTime(timezone=True)) for n in ("date", "date_end", "sort_at")),
    )
    token = sa.table(
        "fhir_token",
        *(sa.column(n, sa.String()) for n in ("note_key", "role", "param", "system", "code")),
        sa.column("version", sa.Integer()),
    )
    newest = (
        sa.select(note.c.note_key, sa.func.max(note.c.version).label("v"))
        .group_by(note.c.note_key)
        .subquery()
    )
    decompressor = zstandard.ZstdDecompressor()
    last_id = 0
    while True:  # in batches, so a large store converts in bounded memory
        rows = connection.execute(
            sa.select(note.c.id, note.c.note_key, note.c.version, note.c.bundle, note.c.roles)
            .join(
                newest, sa.and_(note.c.note_key == newest.c.note_key, note.c.version == newest.c.v)
            )
            .where(note.c.id > last_id)
            .order_by(note.c.id)
            .limit(500)
        ).all()
        if not rows:
            return
        for _id, key, version, packed, roles in rows:
            bundle = orjson.loads(decompressor.decompress(bytes(packed)))
            names = [pair.split("/", 1)[1] for pair in roles.split()]
            indexed, tokens = [], []
            for entry, role in zip(bundle["entry"], names, strict=True):
                resource = entry["resource"]
                if resource["resourceType"] not in _DATE_ELEMENT:
                    continue
                start, end = _range(resource)
                indexed.append(
                    {
                        "note_key": key,
                        "role": role,
                        "version": version,
                        "resource_type": resource["resourceType"],
                        "latest": True,
                        "status": resource.get("status", ""),
                        "date": start,
                        "date_end": end,
                        "sort_at": start or _NO_DATE,
                    }
                )
                tokens += [
                    {
                        "note_key": key,
                        "version": version,
                        "role": role,
                        "param": p,
                        "system": s,
                        "code": c,
                    }
                    for p, s, c in _tokens(resource)
                ]
            if indexed:
                connection.execute(index.insert(), indexed)
            if tokens:
                connection.execute(token.insert(), tokens)
        last_id = rows[-1][0]


def downgrade() -> None:
    # The index of 0003 held two types only; rebuilding it is not worth a path of its own.
    raise RuntimeError("migration 0004 cannot be undone; restore a backup taken before it")
