"""The review contract: what the review visit after a laser session found, as the sender
gives it.

One record per review visit (or per missed one), linked to its laser session by the
session note's identifier. As in the session note (capnote.note), the models check shape
and type only; what a site may tune and every rule across fields live in
capnote.rules.review, so that they come back as findings with a source.

Every finding is three-valued: true (seen), false (looked for and not seen) or omitted/null
(not recorded). Not recorded is never read, stored, emitted or counted as "no".
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AwareDatetime, StringConstraints

from capnote.note import (
    Clinician,
    Contract,
    Count,
    Eye,
    Identifier,
    IopReading,
    Location,
    NoteStatus,
    Text,
    VisualAcuity,
)

# Free text of a few lines: line breaks allowed, other control characters not.
Comment = Annotated[
    str,
    StringConstraints(
        strip_whitespace=True,
        min_length=1,
        max_length=1000,
        pattern=r"^[^\x00-\x09\x0b-\x1f\x7f]+$",
    ),
]

ReviewOutcome = Literal["discharged", "further-follow-up"]
"""What was decided at the review: the pathway ends, or the patient is seen again."""


class OpeningAtReview(Contract):
    """The capsule opening as seen at the review."""

    # Open on the visual axis (not closed by regrowth or leaflets).
    patent: bool | None = None
    # Large enough and well placed for the patient's vision and the view of the fundus.
    adequate: bool | None = None


class ReviewFindings(Contract):
    """What the review looked for; each item true, false or not recorded (omitted/null)."""

    iol_pits: bool | None = None
    # Whether the pits trouble the patient (glare, halos): meaningful only when pits are seen.
    iol_pits_troublesome: bool | None = None
    cystoid_macular_oedema: bool | None = None
    retinal_detachment: bool | None = None
    anterior_uveitis: bool | None = None
    raised_iop_needing_treatment: bool | None = None
    # Anything else found, in words.
    other: Text | None = None


class Review(Contract):
    """One review visit after a laser session on one eye (or the record that it was missed)."""

    review_id: Identifier
    # The laser session reviewed: its note's identifier (note_id), as sent with the note.
    session: Identifier
    # Restated so that a review can never be filed under another patient or eye: both must
    # be the session's own.
    patient: Identifier
    eye: Eye
    # False: the patient did not attend the booked review; seen_at is then the booked time
    # and nothing clinical may be recorded (nobody saw the patient).
    attended: bool
    seen_at: AwareDatetime
    seen_by: Clinician | None = None
    location: Location | None = None
    visual_acuity: VisualAcuity | None = None
    iop: IopReading | None = None
    opening: OpeningAtReview = OpeningAtReview()
    symptoms_relieved: bool | None = None
    findings: ReviewFindings = ReviewFindings()
    retreatment_needed: bool | None = None
    outcome: ReviewOutcome | None = None
    # With further follow-up: in how many days the patient is to be seen again.
    follow_up_days: Count | None = None
    comment: Comment | None = None
    status: NoteStatus
