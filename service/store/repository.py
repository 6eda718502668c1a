"""Listings, searches, tokens and the audit trail over SQLAlchemy sessions. No business
rules here: service.notes decides, this keeps.

What a single submission needs (its reads and its one write) is in service.store.ledger;
every function here takes a Session so that a caller can put several in one transaction.
"""

from __future__ import annotations

import hashlib
import secrets
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime

from sqlalchemy import func
from sqlalchemy import select as core_select
from sqlmodel import Session, col, select

from service.store import ledger
from service.store.ledger import VersionRow
from service.store.tables import ApiToken, AuditEntry, FhirIndex, NoteVersion

# A recognisable prefix lets secret scanners spot leaked tokens; it is not a secret.
TOKEN_PREFIX = "cap_"  # noqa: S105


def to_db(moment: datetime) -> datetime:
    """UTC, the form both engines store alike (SQLModel's UTCDateTime keeps it aware)."""
    return moment.astimezone(UTC)


def from_db(moment: datetime) -> datetime:
    """Aware UTC, whatever the driver returned."""
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def note_exists(session: Session, note_key: str) -> bool:
    """True when the note has any stored version."""
    statement = select(NoteVersion.id).where(NoteVersion.note_key == note_key).limit(1)
    return session.exec(statement).first() is not None


def version_row(row: NoteVersion) -> VersionRow:
    """An ORM row as the ledger's VersionRow (one shape for a stored version everywhere)."""
    return ledger.version_row([getattr(row, name) for name in ledger.VERSION_COLUMNS])


def latest_per_note(
    session: Session,
    patient: tuple[str, str],
    eye: str | None,
    start: datetime | None,
    end: datetime | None,
    offset: int,
    limit: int,
) -> tuple[int, Sequence[NoteVersion]]:
    """The latest version of each note of a patient (optionally one eye and a date range).

    The newest version is taken over all of a note's versions before the patient filter, so
    a note amended onto another patient no longer shows (or counts) under the first one.
    """
    of_patient = select(NoteVersion.note_key).where(
        NoteVersion.patient_system == patient[0], NoteVersion.patient_value == patient[1]
    )
    newest = (
        select(NoteVersion.note_key, func.max(NoteVersion.version).label("v"))
        .where(col(NoteVersion.note_key).in_(of_patient))
        .group_by(col(NoteVersion.note_key))
        .subquery()
    )
    statement = (
        select(NoteVersion)
        .join(
            newest,
            (col(NoteVersion.note_key) == newest.c.note_key)
            & (col(NoteVersion.version) == newest.c.v),
        )
        .where(NoteVersion.patient_system == patient[0], NoteVersion.patient_value == patient[1])
    )
    if eye is not None:
        statement = statement.where(NoteVersion.eye == eye)
    if start is not None:
        statement = statement.where(col(NoteVersion.started_at) >= to_db(start))
    if end is not None:
        statement = statement.where(col(NoteVersion.started_at) < to_db(end))
    total = session.exec(select(func.count()).select_from(statement.subquery())).one()
    rows = session.exec(
        statement.order_by(col(NoteVersion.started_at), col(NoteVersion.note_key))
        .offset(offset)
        .limit(limit)
    ).all()
    return int(total), rows


@dataclass(frozen=True, slots=True)
class Found:
    """A search hit: which resource of which stored version."""

    role: str
    note_key: str
    version: int
    recorded_at: datetime
    bundle: bytes  # compressed, as stored
    roles: str


def fhir_search(
    session: Session,
    kind: str,
    *,
    patient: tuple[str, str] | None = None,
    status: str | None = None,
    after: datetime | None = None,
    before: datetime | None = None,
    include_after: bool = True,
    include_before: bool = True,
    offset: int = 0,
    limit: int = 50,
) -> tuple[int, list[Found]]:
    """Current resources of a searchable type matching patient, status and a date range,
    with the stored version each is read from.

    The patient is the one of the version the resource belongs to, so a note amended onto
    another patient is found under the new one only.
    """
    index, note = FhirIndex.__table__, NoteVersion.__table__  # type: ignore[attr-defined]
    conditions = [index.c.resource_type == kind, index.c.latest.is_(True)]
    if patient is not None:
        conditions += [note.c.patient_system == patient[0], note.c.patient_value == patient[1]]
    if status is not None:
        conditions.append(index.c.status == status)
    if after is not None:
        bound = to_db(after)
        conditions.append(index.c.date >= bound if include_after else index.c.date > bound)
    if before is not None:
        bound = to_db(before)
        conditions.append(index.c.date <= bound if include_before else index.c.date < bound)
    joined = index.join(
        note, (note.c.note_key == index.c.note_key) & (note.c.version == index.c.version)
    )
    total = session.execute(
        core_select(func.count()).select_from(joined).where(*conditions)
    ).scalar_one()
    rows = session.execute(
        core_select(
            index.c.role,
            index.c.note_key,
            index.c.version,
            note.c.recorded_at,
            note.c.bundle,
            note.c.roles,
        )
        .select_from(joined)
        .where(*conditions)
        .order_by(index.c.date, index.c.note_key, index.c.role)
        .offset(offset)
        .limit(limit)
    ).all()
    return int(total), [
        Found(role, key, version, from_db(at), bytes(bundle), roles)
        for role, key, version, at, bundle, roles in rows
    ]


def hash_token(token: str) -> str:
    """SHA-256 of a token: tokens are long random strings, so a plain hash is enough."""
    return hashlib.sha256(token.encode()).hexdigest()


def new_token(session: Session, role: str, label: str, now: datetime) -> tuple[str, ApiToken]:
    """Create a token; the plain token is returned once and never stored."""
    token = TOKEN_PREFIX + secrets.token_urlsafe(32)
    row = ApiToken(token_hash=hash_token(token), role=role, label=label, created_at=to_db(now))
    session.add(row)
    session.flush()
    return token, row


def list_tokens(session: Session) -> Sequence[ApiToken]:
    """Every token, revoked ones included, oldest first."""
    return session.exec(select(ApiToken).order_by(col(ApiToken.id))).all()


def revoke_token(session: Session, token_id: int, now: datetime) -> bool:
    """Mark a token revoked; False when there is no such live token."""
    row = session.get(ApiToken, token_id)
    if row is None or row.revoked_at is not None:
        return False
    row.revoked_at = to_db(now)
    session.add(row)
    return True


def audit_entries(
    session: Session, note_key: str | None, offset: int, limit: int
) -> Sequence[AuditEntry]:
    """Audit entries, newest first, optionally for one note."""
    statement = select(AuditEntry)
    if note_key is not None:
        statement = statement.where(AuditEntry.note_key == note_key)
    return session.exec(
        statement.order_by(col(AuditEntry.id).desc()).offset(offset).limit(limit)
    ).all()
