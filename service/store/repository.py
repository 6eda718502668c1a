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
from sqlalchemy import and_, bindparam, func, insert, update
from sqlalchemy import select as core_select
from sqlmodel import Session, col, select
from sqlmodel.sql.expression import SelectOfScalar

from service.store.tables import ApiToken, AuditEntry, FhirResource, NoteVersion

# A recognisable prefix lets secret scanners spot leaked tokens; it is not a secret.
TOKEN_PREFIX = "cap_"  # noqa: S105

# The statements of the request path are built once, with bound parameters: building and
# cache-keying a statement on every call cost more than running it (about 100 us against
# 30 us on SQLite), and the ORM's object loading as much again, for rows read once.
_NOTE = NoteVersion.__table__  # type: ignore[attr-defined]
_RESOURCE = FhirResource.__table__  # type: ignore[attr-defined]
_AUDIT = AuditEntry.__table__  # type: ignore[attr-defined]
_CONTENT_HASHES = (
    core_select(_NOTE.c.content_hash)
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version)
)
_NEWEST_OF_PATIENT = (
    core_select(_NOTE.c.note_key, func.max(_NOTE.c.version).label("v"))
    .where(
        _NOTE.c.patient_system == bindparam("patient_system"),
        _NOTE.c.patient_value == bindparam("patient_value"),
    )
    .group_by(_NOTE.c.note_key)
    .subquery()
)
_EARLIER_ON_EYE = (
    core_select(_NOTE.c.note_key, _NOTE.c.started_at, _NOTE.c.total_energy_mj, _NOTE.c.status)
    .join(
        _NEWEST_OF_PATIENT,
        and_(
            _NOTE.c.note_key == _NEWEST_OF_PATIENT.c.note_key,
            _NOTE.c.version == _NEWEST_OF_PATIENT.c.v,
        ),
    )
    .where(_NOTE.c.eye == bindparam("eye"), _NOTE.c.started_at < bindparam("before"))
    .order_by(_NOTE.c.started_at, _NOTE.c.note_key)
    .limit(10_000)
)
_TOKEN_BY_HASH: SelectOfScalar[ApiToken] = select(ApiToken).where(
    col(ApiToken.token_hash) == bindparam("digest")
)
_LATEST_RESOURCE: SelectOfScalar[FhirResource] = select(FhirResource).where(
    col(FhirResource.resource_type) == bindparam("kind"),
    col(FhirResource.resource_id) == bindparam("resource_id"),
    col(FhirResource.latest).is_(True),
)


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
class EarlierSession:
    """An earlier session on the same eye, as the store holds it."""

    note_key: str
    started_at: datetime
    total_energy_mj: float


def earlier_sessions(
    session: Session, patient: tuple[str, str], eye: str, before: datetime, exclude: str
) -> list[EarlierSession]:
    """Latest versions of the patient's other notes on this eye that started earlier and are
    not voided: the inputs to cumulative energy.

    The rows latest_per_note(patient, eye, end=before) gives, without its count and its ORM
    objects: every submission asks this.
    """
    rows = session.connection().execute(
        _EARLIER_ON_EYE,
        {
            "patient_system": patient[0],
            "patient_value": patient[1],
            "eye": eye,
            "before": to_db(before),
        },
    )
    return [
        EarlierSession(key, from_db(started), energy or 0.0)
        for key, started, energy, status in rows
        if key != exclude and status != "void"
    ]


def content_hashes(session: Session, note_key: str) -> list[str]:
    """The content digest of every version of a note, oldest first (none for a new note)."""
    rows = session.connection().execute(_CONTENT_HASHES, {"key": note_key})
    return [digest for (digest,) in rows]


def insert_version(
    session: Session,
    values: dict[str, Any],
    resources: list[dict[str, Any]],
    patient: tuple[str, str],
) -> None:
    """add_version for a row given as column values, written with Core statements.

    The note row goes first and alone, so the unique (note_key, version) constraint raises
    IntegrityError before anything else is written; the resources go in one executemany.
    """
    connection = session.connection()
    connection.execute(insert(_NOTE), values)
    if values["version"] > 1 and resources:
        connection.execute(
            update(_RESOURCE)
            .where(_RESOURCE.c.note_key == values["note_key"], _RESOURCE.c.latest.is_(True))
            .values(latest=False)
        )
    if resources:
        connection.execute(
            insert(_RESOURCE),
            [
                {
                    "resource_type": resource["resourceType"],
                    "resource_id": resource["id"],
                    "version": values["version"],
                    "latest": True,
                    "note_key": values["note_key"],
                    "patient_system": patient[0],
                    "patient_value": patient[1],
                    "status": resource.get("status", ""),
                    "date": _resource_date(resource),
                    "body": orjson.dumps(resource).decode(),
                }
                for resource in resources
            ],
        )


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
    return session.exec(_LATEST_RESOURCE, params={"kind": kind, "resource_id": resource_id}).first()


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
    row = session.exec(_TOKEN_BY_HASH, params={"digest": digest}).first()
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


def insert_audit(session: Session, values: dict[str, Any]) -> None:
    """audit() for an entry given as column values (a Core insert, no ORM object)."""
    session.connection().execute(insert(_AUDIT), values)


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
