"""The note lifecycle: submit, resend, amend, void, read. Routes and commands call this.

Idempotency and uniqueness rest on the database: the note key is derived from the sender's
note identifier, and (note key, version) is unique, so two processes racing to store the same
note make one row and the loser reads the winner's.

The methods are coroutines because the store's calls are (capnote.store.base); the
clinical work between them (checks, derived values, schedule, Bundle) is plain computation
and runs where it is called.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from datetime import date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import orjson

from capnote.assess import Assessment, Assessor
from capnote.audit.facts import audit_facts
from capnote.derive import PriorSession, recounted, total_energy_mj
from capnote.drafts import PARTIAL, KeptDraft, amending_kept, draft_key, identity_of, kept_draft
from capnote.errors import (
    ConflictError,
    InputError,
    NotFoundError,
    PreconditionError,
    UnavailableError,
)
from capnote.fhir.common import Emitted, KeyMaker, Version, stable_uuid
from capnote.fhir.provenance import Actor, provenance_entry
from capnote.fhir.readmodel import read_references, searchables
from capnote.findings import Finding, has_errors
from capnote.note import Note
from capnote.note_input import check_match, json_object, known_key, problem, reason_text
from capnote.rules import Context, check_payload, lifecycle
from capnote.rules.lifecycle import Latest
from capnote.store.base import (
    AuditRow,
    DuplicateVersionError,
    NewVersion,
    OutboxRow,
    Store,
    VersionRow,
)
from capnote.store.codec import pack_bundle, pack_roles, unpack_bundle, unpack_roles
from capnote.views import assessment_view

Clock = Callable[[], datetime]

# How often a submission reads the eye's sessions again after a concurrent write moved them.
_ATTEMPTS = 3


@dataclass(frozen=True, slots=True)
class Principal:
    """Who is asking: the person or system client a token belongs to (label: the display
    name; staff: a person's staff identifier, system and value), its role, its token id
    (labels may repeat; ids do not) and where the request came from."""

    label: str
    role: str
    remote: str | None = None
    token_id: int | None = None
    staff: tuple[str, str] | None = None


@dataclass(frozen=True, slots=True)
class Change:
    """A new version to store: the checked note, what it is emitted as, and why. key is the
    note's (note_key), which every caller has already."""

    key: str
    note: Note
    note_json: str
    findings: list[Finding]
    prior: Sequence[PriorSession]
    emitted: Version
    status: str
    reason: str | None
    # For the audit trail and the Provenance: create, amend, void, recount or reviewed.
    action: str
    # A version capnote writes itself keeps the signature of the version it recounts.
    carried: Signature | None = None


@dataclass(frozen=True, slots=True)
class Signature:
    """Who vouched for a signed version, and when: a clinician's own token signs as that
    person; a system client (the EHR) sends what the note's performer signed there."""

    by: str
    staff: tuple[str, str] | None
    # When it was signed; None when the sending system signed it and sent no time (capnote
    # knows only when it received the note, which is the Provenance's recorded time).
    at: datetime | None

    def actor(self) -> Actor:
        """The attester of the version's Provenance."""
        return Actor(self.by, self.staff)


def signature(change: Change, who: Principal, now: datetime) -> Signature | None:
    """The signature a stored version carries: none for a draft or a void; the carried one
    for a version capnote recounts (it signs nothing itself)."""
    if change.status != "final":
        return None
    if change.carried is not None or who.role == SYSTEM.role:
        return change.carried
    if who.role == "clinician":
        return Signature(who.label, who.staff, now)
    performer = change.note.performer
    staff = (performer.identifier.system, performer.identifier.value)
    # The EHR vouches that its performer signed; the note carries no signing time, so none
    # is written down (capnote's receipt time would claim a moment nobody recorded).
    return Signature(performer.name, staff, None)


def signature_of(row: VersionRow) -> Signature | None:
    """The signature a stored version carries (None before signers were recorded)."""
    if row.signed_by is None:
        return None
    system, _, value = (row.signed_by_staff or "").partition("|")
    return Signature(row.signed_by, (system, value) if value else None, row.signed_at)


@dataclass(frozen=True, slots=True)
class StoredNote:
    """One stored note version as the API shows it.

    The note and the Bundle are kept as the JSON text they are stored as, so an answer
    embeds them without parsing and serialising them again.
    """

    key: str
    version: int
    status: str
    recorded_at: datetime
    recorded_by: str
    reason: str | None
    note_json: str
    result: dict[str, Any]
    bundle_json: bytes
    # Where each Bundle entry is read on the FHIR API ("Observation/<id>"), in entry order.
    resources: tuple[str, ...]
    signed: Signature | None = None

    def json(self) -> bytes:
        """The JSON body for this version."""
        return orjson.dumps(
            {
                "id": self.key,
                "version": self.version,
                "status": self.status,
                "recorded_at": self.recorded_at.isoformat(),
                "reason": self.reason,
                "signed": _signed_view(self.signed),
                "note": orjson.Fragment(self.note_json),
                **self.result,
                "resources": self.resources,
                "bundle": orjson.Fragment(self.bundle_json),
            }
        )

    def view(self) -> dict[str, Any]:
        """The same body as data."""
        data: dict[str, Any] = orjson.loads(self.json())
        return data


def _signed_view(signed: Signature | None) -> dict[str, Any] | None:
    if signed is None:
        return None
    staff = None if signed.staff is None else {"system": signed.staff[0], "value": signed.staff[1]}
    at = None if signed.at is None else signed.at.isoformat()
    return {"by": signed.by, "staff_identifier": staff, "at": at}


SYSTEM = Principal("capnote (system)", "system")
"""Who records the versions capnote writes itself (totals counted again)."""


def _session(change: Change) -> PriorSession:
    """The change's session as the eye's totals count it."""
    return PriorSession(change.note.started_at, total_energy_mj(change.note.laser), change.key)


def note_key(note: Note) -> str:
    """capnote's id for a note: stable for the sender's identifier, free of patient data."""
    return stable_uuid(note, "procedure")


def content_hash(note_json: str) -> str:
    """A digest of a note's stored JSON (absent and null fields alike), to tell a resend from
    a change."""
    return hashlib.sha256(note_json.encode()).hexdigest()


# What a version kept as typed stores for its Bundle: an empty one, so that every reader of
# stored Bundles finds one; the API answers null for it (nothing was emitted).
_NO_BUNDLE = b'{"resourceType":"Bundle","type":"transaction","entry":[]}'


def shown_status(status: str) -> str:
    """A version's status as the API shows it: a draft kept as typed is a draft."""
    return "draft" if status == PARTIAL else status


def emitted_nothing(row: VersionRow) -> bool:
    """True for a version kept as typed, or a void of one: no Bundle was ever made for it."""
    return row.status == PARTIAL or (row.status == "void" and not row.roles)


def _stored(row: VersionRow) -> StoredNote:
    return StoredNote(
        key=row.note_key,
        version=row.version,
        status=shown_status(row.status),
        recorded_at=row.recorded_at,
        recorded_by=row.recorded_by,
        reason=row.reason,
        note_json=row.note_json,
        result=orjson.loads(row.result_json),
        bundle_json=b"null" if emitted_nothing(row) else unpack_bundle(row.bundle),
        resources=read_references(row.note_key, unpack_roles(row.roles)),
        signed=signature_of(row),
    )


def emitted_before(row: VersionRow) -> Emitted:
    """What a stored version emitted: its Bundle and the roles of its entries."""
    roles = tuple(role for _kind, role in unpack_roles(row.roles))
    return Emitted(orjson.loads(unpack_bundle(row.bundle)), roles)


def _with_provenance(
    bundle: dict[str, Any],
    roles: tuple[str, ...],
    change: Change,
    who: Principal,
    now: datetime,
    signed: Signature | None,
) -> tuple[dict[str, Any], tuple[str, ...]]:
    """The version's Bundle with its Provenance last: every entry its target, the sender its
    author, the signer its attester (capnote.fhir.provenance)."""
    entry, role = provenance_entry(
        KeyMaker(change.note),
        change.emitted.number,
        [e["fullUrl"] for e in bundle["entry"]],
        change.action,
        now,
        Actor(who.label, who.staff if who.role == "clinician" else None, who.token_id),
        None if signed is None else signed.actor(),
        change.reason,
    )
    return {**bundle, "entry": [*bundle["entry"], entry]}, (*roles, role)


class NoteService:
    """The note lifecycle over one store."""

    def __init__(
        self,
        store: Store,
        assessor: Assessor,
        clock: Clock,
        *,
        forward: bool = False,
    ) -> None:
        self.store = store
        self.assessor = assessor
        self.clock = clock
        # With forwarding on, every stored version gets an outbox entry in its own transaction.
        self.forward = forward

    # -- checking --------------------------------------------------------------------------

    def _checked(self, payload: bytes) -> tuple[Note, list[Finding]]:
        note, findings = check_payload(payload, Context(self.assessor.policy, self.clock()))
        if note is None or has_errors(findings):
            raise InputError("the note has errors", findings)
        return note, findings

    async def _others(self, note: Note, key: str) -> list[PriorSession]:
        """The eye's other sessions, earlier and later (cumulative() counts the earlier)."""
        return await self.store.eye_sessions(
            key, (note.patient.system, note.patient.value), note.eye
        )

    async def _reviewed(self, key: str) -> bool:
        """Whether a signed, attended review of this session is on record (its review
        request stays completed in every later version of the session)."""
        rows = await self.store.reviews_of_session(key)
        return any(r.status == "final" and r.attended for r in rows)

    async def check(self, payload: bytes) -> dict[str, Any]:
        """Everything a submission would produce, stored nowhere."""
        note, findings = check_payload(payload, Context(self.assessor.policy, self.clock()))
        if note is None or has_errors(findings):
            return {**assessment_view(Assessment(note, findings)), "bundle": None}
        key = note_key(note)
        result = self.assessor.complete(note, findings, await self._others(note, key))
        return {"id": key, **assessment_view(result), "bundle": result.bundle}

    # -- writing ---------------------------------------------------------------------------

    def prepare(self, change: Change, who: Principal) -> tuple[NewVersion, StoredNote]:
        """Everything a version stores (derived values, schedule, Bundle, search rows, audit
        entry) and the answer that goes with it; nothing is written yet."""
        key, note, note_json = change.key, change.note, change.note_json
        now = self.clock()
        result = self.assessor.complete(note, change.findings, change.prior, change.emitted)
        if result.bundle is None or result.derived is None:  # complete() always sets both
            raise RuntimeError("assessment of a checked note came back incomplete")
        view = assessment_view(result)
        signed = signature(change, who, now)
        bundle, roles = _with_provenance(result.bundle, result.roles, change, who, now, signed)
        bundle_json = orjson.dumps(bundle)
        kinds = [e["resource"]["resourceType"] for e in bundle["entry"]]
        row = VersionRow(
            note_key=key,
            version=change.emitted.number,
            sender_system=note.note_id.system,
            sender_value=note.note_id.value,
            patient_system=note.patient.system,
            patient_value=note.patient.value,
            eye=note.eye,
            started_at=note.started_at,
            status=change.status,
            total_energy_mj=result.derived.total_energy_mj,
            content_hash=content_hash(note_json),
            note_json=note_json,
            result_json=orjson.dumps(view).decode(),
            bundle=pack_bundle(bundle_json),
            roles=pack_roles(kinds, roles),
            reason=change.reason,
            recorded_at=now,
            recorded_by=who.label,
            recorded_by_token=who.token_id,
            signed_by=None if signed is None else signed.by,
            signed_by_staff=None
            if signed is None or signed.staff is None
            else "|".join(signed.staff),
            signed_at=None if signed is None else signed.at,
            **audit_facts(note, result.derived, result.due),
        )
        index = tuple(searchables(bundle, roles))
        audit = AuditRow(now, who.label, who.role, change.action, who.remote, who.token_id)
        stored = StoredNote(
            key=key,
            version=row.version,
            status=change.status,
            recorded_at=now,
            recorded_by=who.label,
            reason=change.reason,
            note_json=note_json,
            result=view,
            bundle_json=bundle_json,
            resources=read_references(key, tuple(zip(kinds, roles, strict=True))),
            signed=signed,
        )
        return NewVersion(row, index, audit), stored

    async def _write(
        self,
        change: Change,
        who: Principal,
        before: Sequence[PriorSession],
        after: Sequence[PriorSession],
    ) -> StoredNote:
        """Store one change and, in the same transaction, a corrected version of every later
        session of the eye whose session number or cumulative energy it moves (before and
        after: the eye's sessions without and with the change)."""
        new, stored = self.prepare(change, who)
        corrections = [
            await self._recount(other, after, change)
            for other in recounted(before, after)
            if other != change.key
        ]
        await self.store.write_many(
            [new, *(c for c in corrections if c is not None)], forward=self.forward
        )
        return stored

    async def _recount(
        self, key: str, sessions: Sequence[PriorSession], cause: Change
    ) -> NewVersion | None:
        """A new version of a later session with its totals counted again: the same note, a
        system reason, and a Bundle that amends what the hospital record holds."""
        latest = await self.store.latest(key)
        if latest is None or latest.status == "void":
            return None
        note = Note.model_validate_json(latest.note_json)
        # The stored note passed its checks when stored; checking it again today keeps its
        # findings as the current policy sees them, like any other new version.
        _note, findings = check_payload(
            latest.note_json, Context(self.assessor.policy, self.clock())
        )
        what = {"create": "recorded", "amend": "amended", "void": "voided"}[cause.action]
        change = Change(
            key,
            note,
            latest.note_json,
            findings,
            [s for s in sessions if s.key != key],
            Version(
                latest.version + 1,
                amends_final=latest.status == "final",
                previous=emitted_before(latest),
                reviewed=await self._reviewed(key),
            ),
            latest.status,
            f"session number and cumulative energy counted again: an earlier session of this "
            f"eye (note {cause.key}) was {what}",
            "recount",
            signature_of(latest),
        )
        new, _stored_note = self.prepare(change, SYSTEM)
        return new

    async def reviewed_version(self, key: str, reviewed: bool, why: str) -> NewVersion | None:
        """The new version of a signed session that a review visit makes, or None when none
        is needed: its review request completed (reviewed) or owed again, so that capnote's
        own record (the FHIR read API, the searches, the Bundle) says what the hospital's
        now holds. The same note, a system reason, the signature it had; stored by the
        caller with the review, in one transaction."""
        latest = await self.store.latest(key)
        if latest is None or latest.status != "final":
            return None  # a draft's request is a draft; a voided session owes nothing
        before = emitted_before(latest)
        requests = [
            e["resource"]
            for e, role in zip(before.bundle["entry"], before.roles, strict=True)
            if role == "due-review" and e["resource"]["resourceType"] == "ServiceRequest"
        ]
        if not requests or (requests[0]["status"] == "completed") == reviewed:
            return None  # no review booked, or the request says so already
        note = Note.model_validate_json(latest.note_json)
        _note, findings = check_payload(
            latest.note_json, Context(self.assessor.policy, self.clock())
        )
        change = Change(
            key,
            note,
            latest.note_json,
            findings,
            await self._others(note, key),
            Version(latest.version + 1, amends_final=True, previous=before, reviewed=reviewed),
            latest.status,
            why,
            "reviewed",
            signature_of(latest),
        )
        new, _stored_note = self.prepare(change, SYSTEM)
        return new

    async def submit(self, payload: bytes, who: Principal) -> tuple[bool, StoredNote]:
        """Store a new note; (False, stored) when the same note was already there. A draft
        with errors is kept as typed (capnote.drafts) when it says what it is about."""
        note, findings = check_payload(payload, Context(self.assessor.policy, self.clock()))
        if note is None or has_errors(findings):
            return await self._submit_kept(kept_draft(payload, findings), who)
        note_json = note.model_dump_json(exclude_none=True)
        key, digest = note_key(note), content_hash(note_json)
        patient = (note.patient.system, note.patient.value)
        for _attempt in range(_ATTEMPTS):
            # One call for both reads: on PostgreSQL that is one trip to the server.
            digests, others = await self.store.before_write(key, patient, note.eye)
            if digests:
                return False, await self._resent(key, digest, digests)
            change = Change(
                key, note, note_json, findings, others, Version(1), note.status, None, "create"
            )
            try:
                return True, await self._write(change, who, others, [*others, _session(change)])
            except DuplicateVersionError:
                # Another request stored this note, or corrected one of its later sessions,
                # between our read and our write: read again.
                continue
        raise PreconditionError("the eye's record changed meanwhile; send the note again")

    # -- drafts kept as typed ----------------------------------------------------------------

    def _kept(
        self,
        key: str,
        kept: KeptDraft,
        version: int,
        who: Principal,
        action: str,
        *,
        voided: str | None = None,
    ) -> tuple[NewVersion, StoredNote]:
        """The row of a draft kept as typed (or of its void): the JSON and its findings, no
        Bundle, no search rows; never forwarded."""
        now = self.clock()
        ident = kept.identity
        view = assessment_view(Assessment(None, kept.findings))
        row = VersionRow(
            note_key=key,
            version=version,
            sender_system=ident.note_id.system,
            sender_value=ident.note_id.value,
            patient_system=ident.patient.system,
            patient_value=ident.patient.value,
            eye=ident.eye,
            started_at=ident.started_at,
            status="void" if voided is not None else PARTIAL,
            total_energy_mj=None,
            content_hash=content_hash(kept.note_json),
            note_json=kept.note_json,
            result_json=orjson.dumps(view).decode(),
            bundle=pack_bundle(_NO_BUNDLE),
            roles="",
            reason=voided,
            recorded_at=now,
            recorded_by=who.label,
            recorded_by_token=who.token_id,
        )
        audit = AuditRow(now, who.label, who.role, action, who.remote, who.token_id)
        return NewVersion(row, (), audit), _stored(row)

    async def _submit_kept(self, kept: KeptDraft, who: Principal) -> tuple[bool, StoredNote]:
        """Keep a new draft as typed; a resend answers as a resend of a whole note does."""
        key, digest = draft_key(kept.identity), content_hash(kept.note_json)
        ident = kept.identity
        patient = (ident.patient.system, ident.patient.value)
        digests, _others = await self.store.before_write(key, patient, ident.eye)
        if digests:
            return False, await self._resent(key, digest, digests)
        new, stored = self._kept(key, kept, 1, who, "create")
        try:
            await self.store.write_many([new], forward=False)
        except DuplicateVersionError:
            digests, _others = await self.store.before_write(key, patient, ident.eye)
            return False, await self._resent(key, digest, digests)
        return True, stored

    async def _amend_kept(
        self,
        latest: VersionRow,
        note_part: dict[str, Any],
        who: Principal,
        if_match: int,
    ) -> StoredNote:
        """A new version of a draft kept as typed: kept as typed again while it has errors,
        stored and emitted like any new note once it passes (nothing was sent before it)."""
        key = latest.note_key
        payload = orjson.dumps(note_part)
        note, findings = check_payload(payload, Context(self.assessor.policy, self.clock()))
        whole = note is not None and not has_errors(findings)
        if note is not None and whole:
            note_json = note.model_dump_json(exclude_none=True)
            identity: tuple[tuple[str, str], str] = (
                (note.patient.system, note.patient.value),
                note.eye,
            )
            if note_key(note) != key:
                raise _other_identifier()
        else:
            kept = kept_draft(payload, findings)
            note_json, identity = kept.note_json, identity_of(kept.note_json)
            if draft_key(kept.identity) != key:
                raise _other_identifier()
        decision = amending_kept(
            latest_version=latest.version,
            latest_hash=latest.content_hash,
            latest_identity=identity_of(latest.note_json),
            identity=identity,
            content_hash=content_hash(note_json),
            if_match=if_match,
        )
        if decision != "store":
            return _stored(latest)
        try:
            if note is None or not whole:
                new, stored = self._kept(key, kept, latest.version + 1, who, "amend")
                await self.store.write_many([new], forward=False)
                return stored
            # The first version the record sees: a new note for the eye's totals, with the
            # version number counting on from the drafts before it.
            others = await self._others(note, key)
            change = Change(
                key,
                note,
                note_json,
                findings,
                others,
                Version(latest.version + 1),
                note.status,
                None,
                "create",  # the record's first sight of the note (its Provenance: CREATE)
            )
            return await self._write(change, who, others, [*others, _session(change)])
        except DuplicateVersionError as exc:
            raise PreconditionError("the note changed meanwhile; read it and retry") from exc

    async def _resent(self, key: str, digest: str, digests: list[str]) -> StoredNote:
        """For a resend: the record as it stands now when any stored version has this content;
        a conflict when the note is stored with other content."""
        if digest in digests:
            latest = await self.store.latest(key)
            if latest is not None:  # rows are never deleted: it is there
                return _stored(latest)
        raise ConflictError(
            f"a note with this identifier is already stored with different content; "
            f"amend it with PUT /notes/{key}"
        )

    async def amend(self, key: str, body: bytes, who: Principal, if_match: int) -> StoredNote:
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
        latest = await self._latest(key)
        if latest.status == PARTIAL:
            return await self._amend_kept(latest, note_part, who, if_match)
        if latest.status == "void" and emitted_nothing(latest):
            raise ConflictError("the note was voided; it cannot be amended")
        note, findings = self._checked(orjson.dumps(note_part))
        if note_key(note) != key:
            raise _other_identifier()
        note_json = note.model_dump_json(exclude_none=True)
        old = Note.model_validate_json(latest.note_json)
        facts = Latest(latest.version, latest.status, latest.content_hash, old)
        if lifecycle.amendment(facts, note, content_hash(note_json), reason, if_match) != "store":
            return _stored(latest)  # a retry of an amendment that already landed
        emitted = Version(
            latest.version + 1,
            amends_final=latest.status == "final",
            previous=emitted_before(latest),
            reviewed=await self._reviewed(key),
        )
        others = await self._others(note, key)
        change = Change(
            key, note, note_json, findings, others, emitted, note.status, reason, "amend"
        )
        was = PriorSession(old.started_at, latest.total_energy_mj or 0.0, key)
        try:
            return await self._write(change, who, [*others, was], [*others, _session(change)])
        except DuplicateVersionError as exc:
            raise PreconditionError("the note changed meanwhile; read it and retry") from exc

    async def void(self, key: str, body: bytes, who: Principal, if_match: int) -> StoredNote:
        """Mark a note entered-in-error: a new version whose resources say so."""
        key = known_key(key)
        reason = reason_text(json_object(body, allowed={"reason"}).get("reason"), required=True)
        latest = await self._latest(key)
        if emitted_nothing(latest):
            return await self._void_kept(latest, reason, who, if_match)
        note = Note.model_validate_json(latest.note_json)
        facts = Latest(latest.version, latest.status, latest.content_hash, note)
        if lifecycle.voiding(facts, if_match) != "store":
            return _stored(latest)  # voided already (a retry, or someone else did)
        emitted = Version(latest.version + 1, voided=True, amends_final=latest.status == "final")
        others = await self._others(note, key)
        change = Change(key, note, latest.note_json, [], others, emitted, "void", reason, "void")
        was = PriorSession(note.started_at, latest.total_energy_mj or 0.0, key)
        try:
            return await self._write(change, who, [*others, was], others)
        except DuplicateVersionError as exc:
            raise PreconditionError("the note changed meanwhile; read it and retry") from exc

    async def _void_kept(
        self, latest: VersionRow, reason: str | None, who: Principal, if_match: int
    ) -> StoredNote:
        """Void a draft kept as typed: a version that says so, and nothing to withdraw
        anywhere (nothing of it ever left)."""
        if latest.status == "void":
            return _stored(latest)
        check_match(latest.version, if_match)
        kept = kept_draft(latest.note_json.encode(), [])
        new, _stored_note = self._kept(
            latest.note_key, kept, latest.version + 1, who, "void", voided=reason or ""
        )
        # The void keeps the findings the draft had, as a void of a whole note keeps its own.
        row = replace(new.row, result_json=latest.result_json)
        try:
            await self.store.write_many([NewVersion(row, (), new.audit)], forward=False)
        except DuplicateVersionError as exc:
            raise PreconditionError("the note changed meanwhile; read it and retry") from exc
        return _stored(row)

    async def _latest(self, key: str) -> VersionRow:
        latest = await self.store.latest(key)
        if latest is None:
            raise NotFoundError("no note with this id")
        return latest

    # -- reading ---------------------------------------------------------------------------

    async def get(self, key: str, version: int | None = None) -> StoredNote:
        """The latest version, or the one asked for."""
        key = known_key(key)
        row = (
            await self.store.latest(key)
            if version is None
            else await self.store.version(key, version)
        )
        if row is None:
            raise NotFoundError("no such note or version")
        return _stored(row)

    async def versions(self, key: str) -> list[dict[str, Any]]:
        """Every version's summary, oldest first."""
        key = known_key(key)
        rows = await self.store.versions(key)
        if not rows:
            raise NotFoundError("no note with this id")
        return [
            {
                "version": r.version,
                "status": shown_status(r.status),
                "reason": r.reason,
                "recorded_at": r.recorded_at.isoformat(),
                "recorded_by": r.recorded_by,
                "recorded_by_token": r.recorded_by_token,
                "signed": _signed_view(signature_of(r)),
            }
            for r in rows
        ]

    async def search(
        self,
        patient: tuple[str, str],
        eye: str | None,
        start: datetime | None,
        end: datetime | None,
        offset: int,
        limit: int,
    ) -> tuple[int, Sequence[StoredNote]]:
        """The latest version of each matching note, in session order."""
        total, rows = await self.store.latest_per_note(patient, eye, start, end, offset, limit)
        return total, [_stored(r) for r in rows]

    async def worklist(self, day: date | None, who: Principal) -> dict[str, Any]:
        """The form's worklist: the notes of one clinic day (today by default) and the
        drafts whose latest version this principal saved."""
        zone = ZoneInfo(self.assessor.policy.calendar.timezone)
        day = day or self.clock().astimezone(zone).date()
        start = datetime.combine(day, time(0), zone)
        end = datetime.combine(day + timedelta(days=1), time(0), zone)
        rows = await self.store.worklist(start, end, who.token_id, WORKLIST_MAX)
        today = [_summary(r) for r in rows if start <= r.started_at < end]
        drafts = [
            _summary(r)
            for r in rows
            if r.status in ("draft", PARTIAL) and r.recorded_by_token == who.token_id
        ]
        return {"day": day.isoformat(), "today": today, "drafts": drafts}

    async def delivery(self, key: str) -> dict[str, Any]:
        """Where each version's Bundle stands on its way to the hospital's FHIR server."""
        key = known_key(key)
        entries = await self.store.outbox_of_note(key)
        if not entries and not await self.store.note_exists(key):
            raise NotFoundError("no note with this id")
        return delivery_view(key, self.forward, entries)

    async def ready(self) -> None:
        """UnavailableError when the store does not answer, or answers but takes no writes
        (a read-only file or folder, a PostgreSQL standby): notes could not be stored."""
        await self.store.ping()
        if not await self.store.writable():
            raise UnavailableError("the database accepts no writes (read-only)")


WORKLIST_MAX = 200
"""The most notes a worklist lists (a clinic day holds far fewer laser sessions)."""


def _summary(row: VersionRow) -> dict[str, Any]:
    """One line of the worklist: which note, whose, which eye, when, and how far it is."""
    return {
        "id": row.note_key,
        "version": row.version,
        "status": shown_status(row.status),
        "accepted": bool(orjson.loads(row.result_json).get("accepted")),
        "patient": {"system": row.patient_system, "value": row.patient_value},
        "eye": row.eye,
        "started_at": row.started_at.isoformat(),
        "recorded_at": row.recorded_at.isoformat(),
        "recorded_by": row.recorded_by,
    }


def _other_identifier() -> InputError:
    return problem(
        "identifier-mismatch",
        "note.note_id",
        "the note's identifier belongs to another note",
        "an amendment keeps the note identifier",
    )


def delivery_view(key: str, forward: bool, entries: Sequence[OutboxRow]) -> dict[str, Any]:
    """Where each version's Bundle stands on its way to the receiver (a note's or a
    review's: their outbox entries are alike)."""
    return {
        "id": key,
        "forwarding": forward,
        "deliveries": [
            {
                "version": e.version,
                "state": e.state,
                "attempts": e.attempts,
                "last_status": e.last_status,
                "receiver_answer": receiver_answer(e.last_error),
                "next_attempt_at": e.next_attempt_at.isoformat(),
                "delivered_at": e.delivered_at.isoformat() if e.delivered_at else None,
            }
            for e in entries
        ],
    }


def receiver_answer(entry_error: str | None) -> object:
    """The receiver's stored answer, as JSON when it was JSON."""
    if not entry_error:
        return None
    try:
        return orjson.loads(entry_error)
    except orjson.JSONDecodeError:
        return entry_error
