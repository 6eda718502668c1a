"""Reading and writing the store. No business rules here: service.notes decides, this keeps.

Every function takes a Session so that a caller can put several in one transaction (a note
version, its FHIR resources and its audit entry are committed together or not at all).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import orjson
from sqlalchemy import func, update
from sqlmodel import Session, col, select

from service.store.tables import ApiToken, AuditEntry, FhirResource, NoteVersion

# A recognisable prefix lets secret scanners spot leaked tokens; it is not a secret.
TOKEN_PREFIX = "cap_"  # noqa: S105


def to_db(moment: datetime) -> datetime:
    """UTC, the form both engines store alike (SQLModel's UTCDateTime keeps it aware)."""
    return moment.astimezone(UTC)


def from_db(moment: datetime) -> datetime:
    """Aware UTC, whatever the driver returned."""
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def latest_version(session: Session, note_key: str) -> NoteVersion | None:
    """The newest version of a note, or None."""
    statement = (
        select(NoteVersion)
        .where(NoteVersion.note_key == note_key)
        .order_by(col(NoteVersion.version).desc())
        .limit(1)
    )
    return session.exec(statement).first()


def note_version(session: Session, note_key: str, version: int) -> NoteVersion | None:
    """One version of a note, or None."""
    statement = select(NoteVersion).where(
        NoteVersion.note_key == note_key, NoteVersion.version == version
    )
    return session.exec(statement).first()


def all_versions(session: Session, note_key: str) -> Sequence[NoteVersion]:
    """Every version of a note, oldest first."""
    statement = (
        select(NoteVersion)
        .where(NoteVersion.note_key == note_key)
        .order_by(col(NoteVersion.version))
    )
    return session.exec(statement).all()


def latest_per_note(
    session: Session,
    patient: tuple[str, str],
    eye: str | None,
    start: datetime | None,
    end: datetime | None,
    offset: int,
    limit: int,
) -> tuple[int, Sequence[NoteVersion]]:
    """The latest version of each note of a patient (optionally one eye and a date range)."""
    newest = (
        select(NoteVersion.note_key, func.max(NoteVersion.version).label("v"))
        .where(NoteVersion.patient_system == patient[0], NoteVersion.patient_value == patient[1])
        .group_by(col(NoteVersion.note_key))
        .subquery()
    )
    statement = select(NoteVersion).join(
        newest,
        (col(NoteVersion.note_key) == newest.c.note_key) & (col(NoteVersion.version) == newest.c.v),
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
class EarlierSession:
    """An earlier session on the same eye, as the store holds it."""

    note_key: str
    started_at: datetime
    total_energy_mj: float


def earlier_sessions(
    session: Session, patient: tuple[str, str], eye: str, before: datetime, exclude: str
) -> list[EarlierSession]:
    """Latest versions of the patient's other notes on this eye that started earlier and are
    not voided: the inputs to cumulative energy."""
    total, rows = latest_per_note(session, patient, eye, None, before, 0, 10_000)
    del total
    return [
        EarlierSession(r.note_key, from_db(r.started_at), r.total_energy_mj or 0.0)
        for r in rows
        if r.note_key != exclude and r.status != "void"
    ]


def add_version(
    session: Session, row: NoteVersion, resources: list[dict[str, Any]], patient: tuple[str, str]
) -> None:
    """Add a note version and its FHIR resources; older resource versions stop being latest."""
    session.add(row)
    session.flush()  # the unique constraint speaks here, before anything else is written
    ids = [r["id"] for r in resources]
    if row.version > 1 and ids:
        session.execute(
            update(FhirResource)
            .where(col(FhirResource.note_key) == row.note_key, col(FhirResource.latest).is_(True))
            .values(latest=False)
        )
    for resource in resources:
        session.add(
            FhirResource(
                resource_type=resource["resourceType"],
                resource_id=resource["id"],
                version=row.version,
                latest=True,
                note_key=row.note_key,
                patient_system=patient[0],
                patient_value=patient[1],
                status=resource.get("status", ""),
                date=_resource_date(resource),
                body=orjson.dumps(resource).decode(),
            )
        )


def _resource_date(resource: dict[str, Any]) -> datetime | None:
    """The date the FHIR search parameter 'date' (or 'occurrence') looks at."""
    text: str | None = None
    if resource["resourceType"] == "Procedure":
        text = resource.get("performedPeriod", {}).get("start")
    elif resource["resourceType"] == "ServiceRequest":
        events = resource.get("occurrenceTiming", {}).get("event") or [None]
        text = events[0]
    elif resource["resourceType"] == "Observation":
        text = resource.get("effectiveDateTime")
    if not text:
        return None
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:  # a whole-day item: its date, at the start of the day (UTC)
        moment = moment.replace(tzinfo=UTC)
    return to_db(moment)


def fhir_latest(session: Session, kind: str, resource_id: str) -> FhirResource | None:
    """The current version of one FHIR resource."""
    statement = select(FhirResource).where(
        FhirResource.resource_type == kind,
        FhirResource.resource_id == resource_id,
        col(FhirResource.latest).is_(True),
    )
    return session.exec(statement).first()


def fhir_history(session: Session, kind: str, resource_id: str) -> Sequence[FhirResource]:
    """Every version of one FHIR resource, newest first (as FHIR _history lists them)."""
    statement = (
        select(FhirResource)
        .where(FhirResource.resource_type == kind, FhirResource.resource_id == resource_id)
        .order_by(col(FhirResource.version).desc())
    )
    return session.exec(statement).all()


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
) -> tuple[int, Sequence[FhirResource]]:
    """Current resources of a type matching patient, status and a date range."""
    statement = select(FhirResource).where(
        FhirResource.resource_type == kind, col(FhirResource.latest).is_(True)
    )
    if patient is not None:
        statement = statement.where(
            FhirResource.patient_system == patient[0], FhirResource.patient_value == patient[1]
        )
    if status is not None:
        statement = statement.where(FhirResource.status == status)
    if after is not None:
        bound = to_db(after)
        statement = statement.where(
            col(FhirResource.date) >= bound if include_after else col(FhirResource.date) > bound
        )
    if before is not None:
        bound = to_db(before)
        statement = statement.where(
            col(FhirResource.date) <= bound if include_before else col(FhirResource.date) < bound
        )
    total = session.exec(select(func.count()).select_from(statement.subquery())).one()
    rows = session.exec(
        statement.order_by(col(FhirResource.date), col(FhirResource.id)).offset(offset).limit(limit)
    ).all()
    return int(total), rows


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


def find_token(session: Session, token: str) -> ApiToken | None:
    """The live token row for a presented token, compared in constant time."""
    digest = hash_token(token)
    row = session.exec(select(ApiToken).where(ApiToken.token_hash == digest)).first()
    if row is None or not hmac.compare_digest(row.token_hash, digest) or row.revoked_at:
        return None
    return row


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


def audit(session: Session, entry: AuditEntry) -> None:
    """Add an audit entry."""
    session.add(entry)


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
