"""The shapes of the API's JSON answers, as the OpenAPI document publishes them.

The derived values and due items are the domain's own dataclasses (capnote.derive,
capnote.schedule), written by orjson as they are; these models describe them for the
OpenAPI document and for schemas/answers.schema.json, and the tests validate real answers
against that published file. Renaming a field inside the domain therefore changes a
committed file and fails a test, never the public API silently.
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from capnote.derive import Derived
from capnote.note import Note
from capnote.schedule import DueItem


class Answer(BaseModel):
    """Every answer model: no field beyond those listed."""

    model_config = ConfigDict(extra="forbid")


class FindingAnswer(Answer):
    """One finding: where, what, the rule and the allowed range."""

    severity: Literal["error", "warning", "information"]
    code: str
    location: str = Field(description="FHIRPath-style path into the note")
    message: str
    rule: str
    value: Any = Field(default=None, description="the value found, shortened")
    allowed: str | None = None
    source: str | None = Field(default=None, description="the literature or practice source")


class AssessmentAnswer(Answer):
    """What capnote says about a note: findings, derived values and due items."""

    accepted: bool = Field(description="false when any finding is an error")
    findings: list[FindingAnswer]
    outcome: dict[str, Any] = Field(description="the findings as a FHIR R4 OperationOutcome")
    derived: Derived | None
    due: list[DueItem] = Field(description="follow-up items, with windows on clinic days")
    caution: str


class StaffIdentifier(Answer):
    """A person's identifier in the site's staff system."""

    system: str
    value: str


class Signed(Answer):
    """Who vouched for a signed version: a clinician signing with their own token, or the
    note's performer as the sending system (the EHR) records them."""

    by: str
    staff_identifier: StaffIdentifier | None
    at: datetime | None = Field(
        description="when it was signed; null when the sending system signed it and sent no time"
    )


class NoteAnswer(AssessmentAnswer):
    """One stored version of a note (POST /notes, GET /notes/{id}, PUT, void)."""

    id: str = Field(description="capnote's note id (a UUID)")
    version: int
    status: Literal["draft", "final", "void"]
    recorded_at: datetime
    reason: str | None
    signed: Signed | None = Field(
        description="who signed this version and when (none for a draft or a void)"
    )
    note: Note | dict[str, Any] = Field(
        description="the note; a draft kept as typed (accepted false) is the JSON as sent"
    )
    resources: list[str] = Field(
        description="where each Bundle entry is read on the FHIR API, in entry order"
    )
    bundle: dict[str, Any] | None = Field(
        description="the FHIR R4 transaction Bundle; null for a draft kept as typed, which is "
        "emitted and forwarded only once it passes the contract"
    )


class CheckAnswer(AssessmentAnswer):
    """POST /notes/check: everything a submission would produce, stored nowhere."""

    id: str | None = None
    bundle: dict[str, Any] | None = Field(description="the Bundle, when the note has no errors")


class NoteListAnswer(Answer):
    """GET /notes: the latest version of each matching note, in session order."""

    total: int
    page: int
    count: int
    notes: list[NoteAnswer]


class VersionSummary(Answer):
    """One version in a note's history."""

    version: int
    status: Literal["draft", "final", "void"]
    reason: str | None
    recorded_at: datetime
    recorded_by: str = Field(description="the person or system client the token belongs to")
    recorded_by_token: int | None = Field(
        description="the id of the token that stored it (labels may repeat; ids do not)"
    )
    signed: Signed | None


class VersionsAnswer(Answer):
    """GET /notes/{id}/versions."""

    id: str
    versions: list[VersionSummary]


class WorklistNote(Answer):
    """One line of the worklist."""

    id: str
    version: int
    status: Literal["draft", "final", "void"]
    accepted: bool = Field(description="false for a draft that still has errors")
    patient: dict[str, str] = Field(description="the patient identifier (system and value)")
    eye: Literal["right", "left"]
    started_at: datetime
    recorded_at: datetime
    recorded_by: str


class WorklistAnswer(Answer):
    """GET /notes/worklist: one clinic day's notes and the asking token's drafts."""

    day: date
    today: list[WorklistNote]
    drafts: list[WorklistNote]


class DeliveryState(Answer):
    """Where one version's Bundle stands on its way to the hospital's FHIR server."""

    version: int
    state: Literal["pending", "delivering", "delivered", "failed"]
    attempts: int
    last_status: int | None
    receiver_answer: Any = Field(description="the receiver's last answer (JSON when it was)")
    next_attempt_at: datetime
    delivered_at: datetime | None


class DeliveryAnswer(Answer):
    """GET /notes/{id}/delivery."""

    id: str
    forwarding: bool
    deliveries: list[DeliveryState]


class AuditEntryAnswer(Answer):
    """One entry of the audit trail: identifiers only, no clinical text."""

    at: datetime
    actor: str
    role: str
    action: str
    note: str | None
    version: int | None
    remote: str | None
    outcome: str
    token_id: int | None = Field(description="the token used (labels may repeat; ids do not)")
    detail: str | None = Field(
        description="what was read or searched for, or why a request was refused: "
        "resource ids and search parameters only"
    )


class AuditAnswer(Answer):
    """GET /audit."""

    page: int
    count: int
    entries: list[AuditEntryAnswer]


class StatusAnswer(Answer):
    """GET /healthz and /readyz."""

    status: Literal["ok", "ready"]


class ReviewDerived(Answer):
    """What capnote works out from a review visit."""

    logmar: float | None
    iop_change_from_pre_laser_mmhg: float | None = Field(
        description="the review IOP minus the session's pre-laser IOP"
    )
    days_after_session: int | None


class ReviewCheckAnswer(Answer):
    """POST /reviews/check: findings and, for a review without errors, its Bundle."""

    id: str | None = None
    accepted: bool = Field(description="false when any finding is an error")
    findings: list[FindingAnswer]
    outcome: dict[str, Any] = Field(description="the findings as a FHIR R4 OperationOutcome")
    derived: ReviewDerived | None
    caution: str
    bundle: dict[str, Any] | None


class ReviewAnswer(ReviewCheckAnswer):
    """One stored version of a review visit record."""

    id: str = Field(description="capnote's review id (a UUID)")
    version: int
    status: Literal["draft", "final", "void"]
    session_id: str = Field(description="the note id of the laser session reviewed")
    recorded_at: datetime
    recorded_by: str
    reason: str | None
    review: dict[str, Any] = Field(description="the review as stored (capnote.review.Review)")


class ReviewVersionSummary(Answer):
    """One version in a review's history."""

    version: int
    status: Literal["draft", "final", "void"]
    reason: str | None
    recorded_at: datetime
    recorded_by: str


class ReviewVersionsAnswer(Answer):
    """GET /reviews/{id}/versions."""

    id: str
    versions: list[ReviewVersionSummary]


class SessionReview(Answer):
    """One review of a session, as GET /notes/{id}/reviews lists it."""

    id: str
    version: int
    status: Literal["draft", "final", "void"]
    seen_at: datetime
    attended: bool
    outcome: Literal["discharged", "further-follow-up"] | None
    recorded_by: str


class SessionReviewsAnswer(Answer):
    """GET /notes/{id}/reviews: the newest version of each review of the session."""

    session_id: str
    reviews: list[SessionReview]


ANSWERS: tuple[type[Answer], ...] = (
    NoteAnswer,
    CheckAnswer,
    NoteListAnswer,
    VersionsAnswer,
    DeliveryAnswer,
    AuditAnswer,
    StatusAnswer,
    ReviewAnswer,
    ReviewCheckAnswer,
    ReviewVersionsAnswer,
    SessionReviewsAnswer,
)
