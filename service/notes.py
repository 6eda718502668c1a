"""The note lifecycle: submit, resend, amend, void, read. Routes and commands call this.

Idempotency and uniqueness rest on the database: the note key is derived from the sender's
note identifier, and (note key, version) is unique, so two processes racing to store the same
note make one row and the loser reads the winner's.
"""

from __future__ import annotations

import hashlib
import threading
from collections.abc import Callable, Sequence
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import orjson
from sqlalchemy import Engine
from sqlalchemy.exc import IntegrityError
from sqlmodel import Session

from schemas.note import Note
from service.assess import Assessment, Assessor
from service.derive import PriorSession
from service.errors import ConflictError, InputError, NotFoundError, PreconditionError
from service.fhir.common import Version, stable_uuid
from service.findings import Finding, has_errors
from service.note_input import check_match, json_object, known_key, problem, reason_text
from service.rules import Context, check_payload
from service.store import outbox
from service.store import repository as repo
from service.store.tables import NoteVersion
from service.views import assessment_view

Clock = Callable[[], datetime]


@dataclass(frozen=True, slots=True)
class Principal:
    """Who is asking: a token's label and role, and where from."""

    label: str
    role: str
    remote: str | None = None


@dataclass(frozen=True, slots=True)
class StoredNote:
    """One stored note version as the API shows it."""

    key: str
    version: int
    status: str
    recorded_at: datetime
    recorded_by: str
    reason: str | None
    note: dict[str, Any]
    result: dict[str, Any]
    bundle: dict[str, Any]

    def view(self) -> dict[str, Any]:
        """The JSON body for this version."""
        return {
            "id": self.key,
            "version": self.version,
            "status": self.status,
            "recorded_at": self.recorded_at.isoformat(),
            "reason": self.reason,
            "note": self.note,
            **self.result,
            "bundle": self.bundle,
        }


def note_key(note: Note) -> str:
    """capnote's id for a note: stable for the sender's identifier, free of patient data."""
    return stable_uuid(note, "procedure")


def content_hash(note: Note) -> str:
    """A digest of the note's content, to tell a resend from a change."""
    return hashlib.sha256(note.model_dump_json().encode()).hexdigest()


def _stored(row: NoteVersion) -> StoredNote:
    return StoredNote(
        key=row.note_key,
        version=row.version,
        status=row.status,
        recorded_at=repo.from_db(row.recorded_at),
        recorded_by=row.recorded_by,
        reason=row.reason,
        note=orjson.loads(row.note_json),
        result=orjson.loads(row.result_json),
        bundle=orjson.loads(row.bundle_json),
    )


def _read_copies(bundle: dict[str, Any], version: int, at: datetime) -> list[dict[str, Any]]:
    """The Bundle's resources as the read API serves them: with id and meta."""
    out = []
    for entry in bundle["entry"]:
        resource = entry["resource"]
        key = entry["fullUrl"].removeprefix("urn:uuid:")
        meta = {"versionId": str(version), "lastUpdated": at.isoformat()}
        out.append(
            {
                "resourceType": resource["resourceType"],
                "id": key,
                "meta": meta,
                **{k: v for k, v in resource.items() if k != "resourceType"},
            }
        )
    return out


class NoteService:
    """The note lifecycle over one store."""

    def __init__(
        self, engine: Engine, assessor: Assessor, clock: Clock, *, forward: bool = False
    ) -> None:
        self.engine = engine
        self.assessor = assessor
        self.clock = clock
        # With forwarding on, every stored version gets an outbox entry in its own transaction.
        self.forward = forward
        # SQLite has one writer at a time, and a writer that finds the database locked sleeps
        # in steps of up to 100 ms (its busy handler) although the lock is held for about a
        # millisecond: under concurrent submissions the threads of one process then spend
        # their time asleep. They queue here instead and wake as soon as the writer commits;
        # other processes still meet the busy handler. PostgreSQL locks rows, not the file.
        self._write_turn: AbstractContextManager[object] = (
            threading.Lock() if engine.dialect.name == "sqlite" else nullcontext()
        )

    # -- checking --------------------------------------------------------------------------

    def _checked(self, payload: bytes) -> tuple[Note, list[Finding]]:
        note, findings = check_payload(payload, Context(self.assessor.policy, self.clock()))
        if note is None or has_errors(findings):
            raise InputError("the note has errors", findings)
        return note, findings

    def _priors(self, session: Session, note: Note, key: str) -> list[PriorSession]:
        rows = repo.earlier_sessions(
            session, (note.patient.system, note.patient.value), note.eye, note.started_at, key
        )
        return [PriorSession(r.started_at, r.total_energy_mj) for r in rows]

    def check(self, payload: bytes) -> dict[str, Any]:
        """Everything a submission would produce, stored nowhere."""
        note, findings = check_payload(payload, Context(self.assessor.policy, self.clock()))
        if note is None or has_errors(findings):
            return {**assessment_view(Assessment(note, findings)), "bundle": None}
        with Session(self.engine) as session:
            prior = self._priors(session, note, note_key(note))
        result = self.assessor.complete(note, findings, prior)
        return {"id": note_key(note), **assessment_view(result), "bundle": result.bundle}

    # -- writing ---------------------------------------------------------------------------

    def _write(
        self,
        session: Session,
        note: Note,
        findings: list[Finding],
        emitted: Version,
        status: str,
        reason: str | None,
        who: Principal,
        action: str,
        digest: str | None = None,
    ) -> StoredNote:
        key = note_key(note)
        now = self.clock()
        version = emitted.number
        result = self.assessor.complete(note, findings, self._priors(session, note, key), emitted)
        if result.bundle is None or result.derived is None:  # complete() always sets both
            raise RuntimeError("assessment of a checked note came back incomplete")
        note_json = note.model_dump_json(exclude_none=True)
        result_json = orjson.dumps(assessment_view(result))
        bundle_json = orjson.dumps(result.bundle)
        recorded_at = repo.to_db(now)
        # Column values and Core inserts, not ORM objects: building, flushing and refreshing
        # a NoteVersion and its FhirResources was most of a submission's time. Everything
        # above is done before the first write, so the write lock is held for the writes only.
        values = {
            "note_key": key,
            "version": version,
            "sender_system": note.note_id.system,
            "sender_value": note.note_id.value,
            "patient_system": note.patient.system,
            "patient_value": note.patient.value,
            "eye": note.eye,
            "started_at": repo.to_db(note.started_at),
            "status": status,
            "total_energy_mj": result.derived.total_energy_mj,
            "content_hash": digest or content_hash(note),
            "note_json": note_json,
            "result_json": result_json.decode(),
            "bundle_json": bundle_json.decode(),
            "reason": reason,
            "recorded_at": recorded_at,
            "recorded_by": who.label,
        }
        copies = _read_copies(result.bundle, version, now)
        with self._write_turn:
            repo.insert_version(session, values, copies, (note.patient.system, note.patient.value))
            if self.forward:
                outbox.enqueue(session, key, version, now)
            self._audit(session, who, action, key, version, "ok")
            session.commit()
        # What a re-read of the row would give (the store keeps these texts verbatim).
        return StoredNote(
            key=key,
            version=version,
            status=status,
            recorded_at=repo.from_db(recorded_at),
            recorded_by=who.label,
            reason=reason,
            note=orjson.loads(note_json),
            result=orjson.loads(result_json),
            bundle=orjson.loads(bundle_json),
        )

    def _audit(
        self,
        session: Session,
        who: Principal,
        action: str,
        key: str | None,
        version: int | None,
        outcome: str,
    ) -> None:
        repo.insert_audit(
            session,
            {
                "at": repo.to_db(self.clock()),
                "actor": who.label,
                "role": who.role,
                "action": action,
                "note_key": key,
                "version": version,
                "remote": who.remote,
                "outcome": outcome,
            },
        )

    def submit(self, payload: bytes, who: Principal) -> tuple[bool, StoredNote]:
        """Store a new note; (False, stored) when the same note was already there."""
        note, findings = self._checked(payload)
        key, digest = note_key(note), content_hash(note)
        with Session(self.engine) as session:
            known = self._same_content(session, key, digest)
            if known is not None:
                return False, known
            try:
                return True, self._write(
                    session, note, findings, Version(1), note.status, None, who, "create", digest
                )
            except IntegrityError:
                session.rollback()
        # Another request stored this note between our read and our write.
        with Session(self.engine) as session:
            known = self._same_content(session, key, digest)
            if known is not None:
                return False, known
            raise self._conflict(key)

    def _same_content(self, session: Session, key: str, digest: str) -> StoredNote | None:
        """For a resend: the record as it stands now when any stored version has this content;
        None when the note is new; a conflict when it is stored with other content."""
        # Digests first: a new note, the common case, then costs one narrow query.
        digests = repo.content_hashes(session, key)
        if not digests:
            return None
        if digest in digests:
            latest = repo.latest_version(session, key)
            if latest is not None:  # rows are never deleted: it is there
                return _stored(latest)
        raise self._conflict(key)

    @staticmethod
    def _conflict(key: str) -> ConflictError:
        return ConflictError(
            f"a note with this identifier is already stored with different content; "
            f"amend it with PUT /notes/{key}"
        )

    def amend(self, key: str, body: bytes, who: Principal, if_match: int | None) -> StoredNote:
        """Store a new version of a note; a signed note needs a reason and stays signed."""
        key = known_key(key)
        wrapper = json_object(body, allowed={"note", "reason"})
        note_part, reason = wrapper.get("note"), reason_text(wrapper.get("reason"), required=False)
        if not isinstance(note_part, dict):
            raise problem(
                "missing-field",
                "note",
                "the amended note is missing",
                'PUT /notes/{id} takes {"reason": ..., "note": {...}}',
            )
        note, findings = self._checked(orjson.dumps(note_part))
        if note_key(note) != key:
            raise problem(
                "identifier-mismatch",
                "note.note_id",
                "the note's identifier belongs to another note",
                "an amendment keeps the note identifier",
            )
        with Session(self.engine) as session:
            latest = self._latest(session, key)
            if latest.content_hash == content_hash(note) and latest.status != "void":
                return _stored(latest)  # a retry of an amendment that already landed
            check_match(latest, if_match)
            if latest.status == "void":
                raise ConflictError("the note was voided; it cannot be amended")
            if latest.status == "final" and not reason:
                raise problem(
                    "missing-field",
                    "reason",
                    "amending a signed note needs a reason",
                    "a final note is amended only with a reason",
                )
            if latest.status == "final" and note.status == "draft":
                raise problem(
                    "status-regression",
                    "note.status",
                    "a signed note cannot go back to draft",
                    "once final, later versions are final",
                )
            emitted = Version(
                latest.version + 1,
                amends_final=latest.status == "final",
                previous=orjson.loads(latest.bundle_json),
            )
            try:
                return self._write(
                    session, note, findings, emitted, note.status, reason, who, "amend"
                )
            except IntegrityError as exc:
                raise PreconditionError("the note changed meanwhile; read it and retry") from exc

    def void(self, key: str, body: bytes, who: Principal, if_match: int | None) -> StoredNote:
        """Mark a note entered-in-error: a new version whose resources say so."""
        key = known_key(key)
        reason = reason_text(json_object(body, allowed={"reason"}).get("reason"), required=True)
        with Session(self.engine) as session:
            latest = self._latest(session, key)
            if latest.status == "void":
                return _stored(latest)  # voided already (a retry, or someone else did)
            check_match(latest, if_match)
            note = Note.model_validate_json(latest.note_json)
            emitted = Version(
                latest.version + 1, voided=True, amends_final=latest.status == "final"
            )
            try:
                return self._write(session, note, [], emitted, "void", reason, who, "void")
            except IntegrityError as exc:
                raise PreconditionError("the note changed meanwhile; read it and retry") from exc

    def _latest(self, session: Session, key: str) -> NoteVersion:
        latest = repo.latest_version(session, key)
        if latest is None:
            raise NotFoundError("no note with this id")
        return latest

    # -- reading ---------------------------------------------------------------------------

    def get(self, key: str, version: int | None = None) -> StoredNote:
        """The latest version, or the one asked for."""
        key = known_key(key)
        with Session(self.engine) as session:
            row = (
                repo.latest_version(session, key)
                if version is None
                else repo.note_version(session, key, version)
            )
            if row is None:
                raise NotFoundError("no such note or version")
            return _stored(row)

    def versions(self, key: str) -> list[dict[str, Any]]:
        """Every version's summary, oldest first."""
        key = known_key(key)
        with Session(self.engine) as session:
            rows = repo.all_versions(session, key)
            if not rows:
                raise NotFoundError("no note with this id")
            return [
                {
                    "version": r.version,
                    "status": r.status,
                    "reason": r.reason,
                    "recorded_at": repo.from_db(r.recorded_at).isoformat(),
                    "recorded_by": r.recorded_by,
                }
                for r in rows
            ]

    def search(
        self,
        patient: tuple[str, str],
        eye: str | None,
        start: datetime | None,
        end: datetime | None,
        offset: int,
        limit: int,
    ) -> tuple[int, Sequence[StoredNote]]:
        """The latest version of each matching note, in session order."""
        with Session(self.engine) as session:
            total, rows = repo.latest_per_note(session, patient, eye, start, end, offset, limit)
            return total, [_stored(r) for r in rows]
