"""The review visit's lifecycle: submit, resend, amend, void, read. Routes call this.

A review record follows one stored laser session (capnote.review): its checks need the
session as stored (patient, eye, start, whether a review was booked), and its Bundle
completes the session's review ServiceRequest. As for notes, idempotency rests on the
database: the review key comes from the sender's review identifier and (review key,
version) is unique, so a resend stores nothing and a race makes one row.

Errors always block, drafts included: a review kept with errors would say something about
a patient that nobody could stand behind.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import orjson

from capnote.acuity import to_logmar
from capnote.assess import Assessor
from capnote.errors import ConflictError, InputError, NotFoundError, PreconditionError
from capnote.fhir.common import PROCEDURE_ROLE, Emitted, KeyMaker, Version
from capnote.fhir.outcome import outcome
from capnote.fhir.provenance import Actor, provenance_entry
from capnote.fhir.review import ReviewDerived, emit_review
from capnote.findings import Finding, has_errors
from capnote.note import Identifier, Note
from capnote.note_input import check_match, json_object, known_key, problem, reason_text
from capnote.notes import NoteService, Principal, delivery_view
from capnote.plain_text import CAUTION
from capnote.review import Review
from capnote.rules import Context
from capnote.rules.review import ReviewedSession, check_review, parse_review
from capnote.store.base import AuditRow, DuplicateVersionError, Store, VersionRow
from capnote.store.codec import pack_bundle, pack_roles, unpack_bundle, unpack_roles
from capnote.store.review_sql import ReviewRow
from capnote.views import finding_view

Clock = Callable[[], datetime]
# The role of a review record's own id among its keys (its resources have their own roles).
REVIEW_ROLE = "review"
REVIEW_KIND = "review"


def review_key(review: Review) -> str:
    """capnote's id for a review record: stable for the sender's identifier."""
    return KeyMaker.of_record(review.review_id, REVIEW_KIND).key(REVIEW_ROLE)


def session_key(identifier: Identifier) -> str:
    """The note id of the session a note identifier names (capnote.notes.note_key)."""
    return KeyMaker.of_record(identifier, "").key(PROCEDURE_ROLE)


def _hash(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


@dataclass(frozen=True, slots=True)
class StoredReview:
    """One stored review version as the API shows it."""

    key: str
    version: int
    status: str
    session_key: str
    recorded_at: datetime
    recorded_by: str
    reason: str | None
    review_json: str
    result: dict[str, Any]
    bundle_json: bytes

    def json(self) -> bytes:
        """The JSON body for this version."""
        return orjson.dumps(
            {
                "id": self.key,
                "version": self.version,
                "status": self.status,
                "session_id": self.session_key,
                "recorded_at": self.recorded_at.isoformat(),
                "recorded_by": self.recorded_by,
                "reason": self.reason,
                "review": orjson.Fragment(self.review_json),
                **self.result,
                "bundle": orjson.Fragment(self.bundle_json),
            }
        )

    def view(self) -> dict[str, Any]:
        """The same body as data."""
        data: dict[str, Any] = orjson.loads(self.json())
        return data


def _stored(row: ReviewRow) -> StoredReview:
    return StoredReview(
        key=row.review_key,
        version=row.version,
        status=row.status,
        session_key=row.session_key,
        recorded_at=row.recorded_at,
        recorded_by=row.recorded_by,
        reason=row.reason,
        review_json=row.review_json,
        result=orjson.loads(row.result_json),
        bundle_json=unpack_bundle(row.bundle),
    )


def reviewed_session(row: VersionRow | None) -> ReviewedSession | None:
    """What the review checks need of the session's latest stored version."""
    if row is None:
        return None
    roles = [role for _kind, role in unpack_roles(row.roles)]
    pre: float | None = None
    if row.status != "partial":
        pre = Note.model_validate_json(row.note_json).before.iop.value_mmhg
    return ReviewedSession(
        key=row.note_key,
        patient=(row.patient_system, row.patient_value),
        eye=row.eye,
        started_at=row.started_at,
        status=row.status,
        # The due items say it (a withdrawn review request stays among the roles); a row
        # from before revision 0008 falls back to the roles.
        booked=row.review_booked if row.review_booked is not None else "due-review" in roles,
        pre_laser_iop=pre,
    )


def derived_values(review: Review, session: ReviewedSession | None) -> dict[str, Any]:
    """What capnote works out from a review: logMAR, the IOP against the session's
    pre-laser reading, and the days since the session (None where an input is missing)."""
    logmar = to_logmar(review.visual_acuity) if review.visual_acuity is not None else None
    change = None
    if review.iop is not None and session is not None and session.pre_laser_iop is not None:
        change = round(review.iop.value_mmhg - session.pre_laser_iop, 1)
    days = None
    if session is not None:
        days = (review.seen_at - session.started_at).days
    return {
        "logmar": logmar,
        "iop_change_from_pre_laser_mmhg": change,
        "days_after_session": days,
    }


def _assessment(
    review: Review | None,
    findings: list[Finding],
    session: ReviewedSession | None,
) -> dict[str, Any]:
    accepted = review is not None and not has_errors(findings)
    return {
        "accepted": accepted,
        "findings": [finding_view(f) for f in findings],
        "outcome": outcome(findings),
        "derived": derived_values(review, session) if review is not None and accepted else None,
        "caution": CAUTION,
    }


class ReviewService:
    """The review lifecycle over one store (the notes' store: reviews sit beside them)."""

    def __init__(
        self, store: Store, assessor: Assessor, clock: Clock, *, forward: bool = False
    ) -> None:
        self.store = store
        self.assessor = assessor
        self.clock = clock
        # With forwarding on, each review version's Bundle goes to the outbox with it.
        self.forward = forward
        # The session's new version when a review completes its request, or reopens it.
        self.notes = NoteService(store, assessor, clock, forward=forward)

    # -- checking --------------------------------------------------------------------------

    async def _session_of(self, review: Review) -> tuple[ReviewedSession | None, VersionRow | None]:
        row = await self.store.latest(session_key(review.session))
        return reviewed_session(row), row

    async def _checked(
        self, payload: bytes
    ) -> tuple[Review | None, list[Finding], ReviewedSession | None, VersionRow | None]:
        review, findings = parse_review(payload)
        if review is None:
            return None, findings, None, None
        session, row = await self._session_of(review)
        ctx = Context(self.assessor.policy, self.clock())
        return review, check_review(review, session, ctx), session, row

    async def check(self, payload: bytes) -> dict[str, Any]:
        """Everything a submission would produce, stored nowhere."""
        review, findings, session, row = await self._checked(payload)
        result = _assessment(review, findings, session)
        if review is None or has_errors(findings) or row is None:
            return {**result, "bundle": None}
        others = await self.store.reviews_of_session(row.note_key)
        emitted = self._emit(review, row, Version(1), others)
        return {"id": review_key(review), **result, "bundle": emitted.bundle}

    def _emit(
        self, review: Review, session_row: VersionRow, version: Version, others: list[ReviewRow]
    ) -> Emitted:
        derived = derived_values(review, reviewed_session(session_row))
        bundle = orjson.loads(unpack_bundle(session_row.bundle))
        roles = tuple(role for _kind, role in unpack_roles(session_row.roles))
        key = review_key(review)
        return emit_review(
            review,
            bundle,
            roles,
            ReviewDerived(derived["logmar"], derived["iop_change_from_pre_laser_mmhg"]),
            version,
            self.assessor.policy.record,
            reviewed_elsewhere=_completed_elsewhere(key, others),
        )

    # -- writing ---------------------------------------------------------------------------

    async def _store(
        self,
        review: Review,
        findings: list[Finding],
        session: ReviewedSession,
        session_row: VersionRow,
        version: Version,
        status: str,
        reason: str | None,
        action: str,
        who: Principal,
    ) -> StoredReview:
        key = review_key(review)
        now = self.clock()
        others = await self.store.reviews_of_session(session.key)
        emitted = self._emit(review, session_row, version, others)
        keys = KeyMaker.of_record(review.review_id, REVIEW_KIND)
        signed = status == "final" and review.seen_by is not None
        seen_by = review.seen_by
        attester = (
            Actor(seen_by.name, (seen_by.identifier.system, seen_by.identifier.value))
            if signed and seen_by is not None
            else None
        )
        entry, role = provenance_entry(
            keys,
            version.number,
            [e["fullUrl"] for e in emitted.bundle["entry"]],
            action,
            now,
            Actor(who.label, who.staff if who.role == "clinician" else None, who.token_id),
            attester,
            reason,
        )
        bundle = {**emitted.bundle, "entry": [*emitted.bundle["entry"], entry]}
        roles = (*emitted.roles, role)
        kinds = [e["resource"]["resourceType"] for e in bundle["entry"]]
        review_json = review.model_dump_json(exclude_none=True)
        result = _assessment(review, findings, session)
        f = review.findings
        attended = review.attended
        row = ReviewRow(
            review_key=key,
            version=version.number,
            session_key=session.key,
            sender_system=review.review_id.system,
            sender_value=review.review_id.value,
            patient_system=review.patient.system,
            patient_value=review.patient.value,
            eye=review.eye,
            seen_at=review.seen_at,
            status=status,
            attended=attended,
            content_hash=_hash(review_json),
            review_json=review_json,
            result_json=orjson.dumps(result).decode(),
            bundle=pack_bundle(orjson.dumps(bundle)),
            roles=pack_roles(kinds, roles),
            reason=reason,
            recorded_at=now,
            recorded_by=who.label,
            recorded_by_token=who.token_id,
            cystoid_macular_oedema=f.cystoid_macular_oedema if attended else None,
            retinal_detachment=f.retinal_detachment if attended else None,
            anterior_uveitis=f.anterior_uveitis if attended else None,
            raised_iop=f.raised_iop_needing_treatment if attended else None,
            iol_pits=f.iol_pits if attended else None,
            retreatment=review.retreatment_needed if attended else None,
            opening_adequate=_opening_adequate(review),
        )
        audit = AuditRow(now, who.label, who.role, f"review-{action}", who.remote, who.token_id)
        completes = status == "final" and review.attended
        reviewed = completes or _completed_elsewhere(key, others)
        if reviewed:
            why = f"the review visit (review {key}) was recorded: the review is done"
        else:
            what = {"void": "voided", "amend": "amended", "create": "recorded"}[action]
            why = f"the review visit (review {key}) was {what}: the review is still owed"
        update = await self.notes.reviewed_version(session.key, reviewed, why)
        try:
            await self.store.write_review(row, audit, forward=self.forward, session=update)
        except DuplicateVersionError as exc:
            raise PreconditionError(
                "the review or its session changed meanwhile; read it and retry"
            ) from exc
        return _stored(row)

    async def submit(self, payload: bytes, who: Principal) -> tuple[bool, StoredReview]:
        """Store a new review record; (False, stored) when the same record was already there."""
        review, findings, session, row = await self._checked(payload)
        if review is None or has_errors(findings) or session is None or row is None:
            raise InputError("the review has errors", findings)
        key = review_key(review)
        digest = _hash(review.model_dump_json(exclude_none=True))
        digests = await self.store.review_hashes(key)
        if digests:
            return False, await self._resent(key, digest, digests)
        try:
            stored = await self._store(
                review, findings, session, row, Version(1), review.status, None, "create", who
            )
        except PreconditionError:
            # Another request stored this review between our read and our write.
            digests = await self.store.review_hashes(key)
            return False, await self._resent(key, digest, digests)
        return True, stored

    async def _resent(self, key: str, digest: str, digests: list[str]) -> StoredReview:
        if digest in digests:
            latest = await self.store.review_latest(key)
            if latest is not None:
                return _stored(latest)
        raise ConflictError(
            f"a review with this identifier is already stored with different content; "
            f"amend it with PUT /reviews/{key}"
        )

    async def amend(self, key: str, body: bytes, who: Principal, if_match: int) -> StoredReview:
        """Store a new version of a review; a signed review needs a reason."""
        key = known_key(key)
        wrapper = json_object(body, allowed={"review", "reason"})
        part, reason = wrapper.get("review"), reason_text(wrapper.get("reason"), required=False)
        if not isinstance(part, dict):
            raise problem(
                "missing-field",
                "review",
                "the amended review is missing",
                'PUT /reviews/{id} takes {"reason": ..., "review": {...}}',
            )
        latest = await self._latest(key)
        if latest.status == "void":
            raise ConflictError("the review was voided; it cannot be amended")
        review, findings, session, row = await self._checked(orjson.dumps(part))
        if review is None or has_errors(findings) or session is None or row is None:
            raise InputError("the review has errors", findings)
        if review_key(review) != key:
            raise problem(
                "identifier-mismatch",
                "review.review_id",
                "the review's identifier belongs to another review",
                "an amendment keeps the review identifier",
            )
        if session.key != latest.session_key:
            raise problem(
                "session-mismatch",
                "review.session",
                "the amended review names another laser session",
                "a review stays with the session it follows",
            )
        review_json = review.model_dump_json(exclude_none=True)
        if _hash(review_json) == latest.content_hash:
            return _stored(latest)  # a retry of an amendment that already landed
        check_match(latest.version, if_match)
        if latest.status == "final":
            if reason is None:
                raise problem(
                    "missing-field",
                    "reason",
                    "a signed review is amended with a reason",
                    "an amendment of a signed review says why",
                )
            if review.status != "final":
                raise problem(
                    "status-regression",
                    "review.status",
                    "a signed review cannot become a draft again",
                    "an amendment of a signed review stays signed",
                )
        version = Version(
            latest.version + 1,
            amends_final=latest.status == "final",
            previous=_emitted(latest),
        )
        return await self._store(
            review, findings, session, row, version, review.status, reason, "amend", who
        )

    async def void(self, key: str, body: bytes, who: Principal, if_match: int) -> StoredReview:
        """Mark a review entered-in-error: a new version whose resources say so, and the
        session's review request owed again."""
        key = known_key(key)
        reason = reason_text(json_object(body, allowed={"reason"}).get("reason"), required=True)
        latest = await self._latest(key)
        if latest.status == "void":
            return _stored(latest)  # voided already (a retry, or someone else did)
        check_match(latest.version, if_match)
        review = Review.model_validate_json(latest.review_json)
        session_row = await self.store.latest(latest.session_key)
        session = reviewed_session(session_row)
        if session is None or session_row is None:  # rows are never deleted
            raise NotFoundError("the review's session is not on record")
        version = Version(
            latest.version + 1,
            voided=True,
            amends_final=latest.status == "final",
            previous=_emitted(latest),
        )
        return await self._store(
            review, [], session, session_row, version, "void", reason, "void", who
        )

    async def _latest(self, key: str) -> ReviewRow:
        latest = await self.store.review_latest(key)
        if latest is None:
            raise NotFoundError("no review with this id")
        return latest

    # -- reading ---------------------------------------------------------------------------

    async def get(self, key: str, version: int | None = None) -> StoredReview:
        """The latest version, or the one asked for."""
        key = known_key(key)
        row = (
            await self.store.review_latest(key)
            if version is None
            else await self.store.review_version(key, version)
        )
        if row is None:
            raise NotFoundError("no such review or version")
        return _stored(row)

    async def versions(self, key: str) -> list[dict[str, Any]]:
        """Every version's summary, oldest first."""
        key = known_key(key)
        rows = await self.store.review_versions(key)
        if not rows:
            raise NotFoundError("no review with this id")
        return [
            {
                "version": r.version,
                "status": r.status,
                "reason": r.reason,
                "recorded_at": r.recorded_at.isoformat(),
                "recorded_by": r.recorded_by,
            }
            for r in rows
        ]

    async def delivery(self, key: str) -> dict[str, Any]:
        """Where each version's Bundle stands on its way to the hospital's FHIR server."""
        key = known_key(key)
        entries = await self.store.outbox_of_note(key)
        if not entries and await self.store.review_latest(key) is None:
            raise NotFoundError("no review with this id")
        return delivery_view(key, self.forward, entries)

    async def of_session(self, note_id: str) -> dict[str, Any]:
        """The reviews of one laser session (the newest version of each), as seen."""
        key = known_key(note_id)
        if not await self.store.note_exists(key):
            raise NotFoundError("no note with this id")
        rows = await self.store.reviews_of_session(key)
        return {
            "session_id": key,
            "reviews": [
                {
                    "id": r.review_key,
                    "version": r.version,
                    "status": r.status,
                    "seen_at": r.seen_at.isoformat(),
                    "attended": r.attended,
                    "outcome": orjson.loads(r.review_json).get("outcome"),
                    "recorded_by": r.recorded_by,
                }
                for r in rows
            ],
        }


def _completed_elsewhere(key: str, others: list[ReviewRow]) -> bool:
    """Whether another review of the session (not key), signed and attended, completed its
    review request (the newest version of each: a voided one completes nothing)."""
    return any(r.status == "final" and r.attended and r.review_key != key for r in others)


def _opening_adequate(review: Review) -> bool | None:
    """Patent and adequate, as the audit counts it: False when either was recorded no,
    True when both were recorded yes, None otherwise (not recorded is never "no")."""
    if not review.attended:
        return None
    patent, adequate = review.opening.patent, review.opening.adequate
    if patent is False or adequate is False:
        return False
    if patent is True and adequate is True:
        return True
    return None


def _emitted(row: ReviewRow) -> Emitted:
    """What a stored review version emitted, without its Provenance (each version's own)."""
    bundle = orjson.loads(unpack_bundle(row.bundle))
    roles = tuple(role for _kind, role in unpack_roles(row.roles))
    kept = [
        (e, r)
        for e, r in zip(bundle["entry"], roles, strict=True)
        if e["resource"]["resourceType"] != "Provenance"
    ]
    return Emitted({**bundle, "entry": [e for e, _r in kept]}, tuple(r for _e, r in kept))
