"""The review visit's checks: a review record in, findings out (capnote.review).

Blocking: the contract, a review that does not belong to its session (another patient or
eye, a session that is not on record or was voided), times that cannot be, contradictions,
and clinical entries on a review nobody attended. Warnings (never blocking) raise what the
literature and common practice expect a reviewer to act on or to record.

A finding not recorded is never read as "no": a check that needs it says that it could not
judge, and nothing here fills it in.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, timedelta

from capnote.findings import Finding, bounded, ordered
from capnote.review import Review
from capnote.rules import graded
from capnote.rules.base import Context, error, information, outside_limit, warning
from capnote.rules.contract import parse_as
from capnote.rules.limits import EARLIEST, acuity_findings

# Steinberg et al., Am J Ophthalmol 1991;112:373 (clinical-practice.md): the complications
# a unit audits after capsulotomy; RD and CME can appear months later.
STEINBERG = "Steinberg et al., Am J Ophthalmol 1991;112:373 (RD 0.89%, CME 1.23%)"
COMMON_PRACTICE = "common practice"
# A review time a little ahead of the server's clock is a clock skew, not an entry error.
_SKEW = timedelta(minutes=5)


@dataclass(frozen=True, slots=True)
class ReviewedSession:
    """What the checks need of the session a review names, as stored (None: not on record)."""

    key: str
    patient: tuple[str, str]
    eye: str
    started_at: datetime
    status: str  # final | draft | void | partial (a draft kept as typed)
    # A review ServiceRequest was booked by the session (its plan gave review days).
    booked: bool
    pre_laser_iop: float | None


def parse_review(payload: bytes | str) -> tuple[Review | None, list[Finding]]:
    """The review, or None with a finding for every contract error."""
    return parse_as(Review, payload)


def check_review(review: Review, session: ReviewedSession | None, ctx: Context) -> list[Finding]:
    """Every finding of every review check, at the site policy's severity, errors first."""
    found = [
        *belongs(review, session),
        *times(review, session, ctx),
        *consistency(review),
        *values(review, ctx),
        *clinical(review, session, ctx),
    ]
    return bounded(ordered(graded(f, ctx) for f in found))


def belongs(review: Review, session: ReviewedSession | None) -> Iterator[Finding]:
    """The review names a stored, live session of the same patient and eye."""
    if session is None:
        yield error(
            "session-unknown",
            "session",
            "no laser session with this note identifier is on record",
            "a review follows a stored laser session: send the session's note first",
            issue_type="not-found",
        )
        return
    if session.status == "void":
        yield error(
            "session-voided",
            "session",
            "the laser session was voided (entered in error)",
            "a review cannot follow a session that was entered in error",
        )
    elif session.status == "partial":
        yield error(
            "session-incomplete",
            "session",
            "the laser session is a draft kept as typed, with errors still to correct",
            "a review follows a session note that passed its checks",
        )
    # No patient identifier in the message: it names the mismatch, never whom.
    if (review.patient.system, review.patient.value) != session.patient:
        yield error(
            "patient-mismatch",
            "patient",
            "the patient is not the laser session's patient",
            "a review is filed under its session's patient, never another",
            issue_type="conflict",
        )
    if review.eye != session.eye:
        yield error(
            "eye-mismatch",
            "eye",
            f"the review is of the {review.eye} eye but the session treated the {session.eye} eye",
            "a review is of the eye its session treated",
            value=review.eye,
            allowed=session.eye,
            issue_type="conflict",
        )


def times(review: Review, session: ReviewedSession | None, ctx: Context) -> Iterator[Finding]:
    """A review happens (or is missed) after its session and not in the future."""
    what = "the review" if review.attended else "the missed review's booked time"
    if review.seen_at < EARLIEST:
        yield error(
            "time-too-early",
            "seen_at",
            f"{what} is dated before {EARLIEST.year}",
            f"{what} is dated from {EARLIEST.year} on",
            value=review.seen_at.isoformat(),
            allowed=f"{EARLIEST.date().isoformat()} or later",
            issue_type="value",
        )
    if session is not None and review.seen_at < session.started_at:
        yield error(
            "review-before-session",
            "seen_at",
            f"{what} is before the laser session started",
            "a review follows its session",
            value=review.seen_at.isoformat(),
            allowed=f"{session.started_at.isoformat()} or later",
            issue_type="value",
        )
    if review.seen_at > ctx.now + _SKEW:
        yield error(
            "review-in-future",
            "seen_at",
            f"{what} is in the future",
            "a review is recorded once it has happened (or been missed)",
            value=review.seen_at.isoformat(),
            allowed=f"{ctx.now.isoformat()} or earlier",
            issue_type="value",
        )


# The parts a missed review cannot have: nobody examined the patient.
_CLINICAL = (
    "seen_by",
    "visual_acuity",
    "iop",
    "symptoms_relieved",
    "retreatment_needed",
    "outcome",
    "follow_up_days",
)
_FINDINGS = (
    "iol_pits",
    "iol_pits_troublesome",
    "cystoid_macular_oedema",
    "retinal_detachment",
    "anterior_uveitis",
    "raised_iop_needing_treatment",
    "other",
)


def recorded_clinical(review: Review) -> list[str]:
    """Where a review records something clinical (a missed review may not)."""
    out = [name for name in _CLINICAL if getattr(review, name) is not None]
    out += [
        f"opening.{n}" for n in ("patent", "adequate") if getattr(review.opening, n) is not None
    ]
    out += [f"findings.{n}" for n in _FINDINGS if getattr(review.findings, n) is not None]
    return out


def consistency(review: Review) -> Iterator[Finding]:
    """Entries that contradict each other, or that a signed review lacks."""
    if not review.attended:
        for where in recorded_clinical(review):
            yield error(
                "missed-review-has-findings",
                where,
                "a missed review records nothing clinical: nobody saw the patient",
                "with attended false, only the booked time (seen_at) is recorded",
            )
        return
    pits, troubles = review.findings.iol_pits, review.findings.iol_pits_troublesome
    if troubles is not None and pits is not True:
        said = "recorded as not seen" if pits is False else "not recorded as seen"
        yield error(
            "pits-trouble-without-pits",
            "findings.iol_pits_troublesome",
            f"whether IOL pits trouble the patient is given, but pits are {said}",
            "iol_pits_troublesome is recorded only with iol_pits true",
        )
    if review.follow_up_days is not None and review.outcome != "further-follow-up":
        yield error(
            "follow-up-days-without-follow-up",
            "follow_up_days",
            "days to the next visit are given, but the outcome is not further follow-up",
            "follow_up_days goes with outcome further-follow-up",
            value=review.follow_up_days,
        )
    if review.status == "final":
        if review.seen_by is None:
            yield error(
                "required-to-sign",
                "seen_by",
                "who saw the patient is missing",
                "a signed review names who saw the patient",
                issue_type="required",
            )
        if review.outcome is None:
            yield error(
                "required-to-sign",
                "outcome",
                "the outcome (discharged or further follow-up) is missing",
                "a signed review says whether the patient was discharged or is seen again",
                issue_type="required",
            )


def values(review: Review, ctx: Context) -> Iterator[Finding]:
    """Numbers against the site's hard limits; acuity readable in its notation."""
    lim = ctx.policy.limits
    if review.iop is not None:
        found = outside_limit("iop.value_mmhg", review.iop.value_mmhg, lim.iop_mmhg, "IOP")
        if found is not None:
            yield found
    if review.follow_up_days is not None:
        found = outside_limit(
            "follow_up_days", review.follow_up_days, lim.review_days, "follow-up interval"
        )
        if found is not None:
            yield found
    yield from acuity_findings("visual_acuity", review.visual_acuity, ctx)


def clinical(review: Review, session: ReviewedSession | None, ctx: Context) -> Iterator[Finding]:
    """What a reviewer is expected to act on or to record (warnings; never blocking)."""
    if session is not None and not session.booked:
        yield information(
            "review-not-booked",
            "session",
            "the session booked no review: this record completes no review request",
            "a review completes the review its session booked",
        )
    if not review.attended:
        return
    f, t = review.findings, ctx.policy.thresholds
    discharged = review.outcome == "discharged"
    found_then = [
        ("findings.retinal_detachment", f.retinal_detachment, "retinal detachment"),
        ("findings.cystoid_macular_oedema", f.cystoid_macular_oedema, "cystoid macular oedema"),
        ("findings.anterior_uveitis", f.anterior_uveitis, "anterior uveitis"),
        (
            "findings.raised_iop_needing_treatment",
            f.raised_iop_needing_treatment,
            "a raised IOP needing treatment",
        ),
    ]
    for where, seen, what in found_then:
        if seen is True and discharged:
            yield warning(
                "complication-discharged",
                where,
                f"{what} was found at the review, and the patient was discharged",
                "a complication found at review is treated or followed up before discharge",
                source=COMMON_PRACTICE,
            )
    if review.status == "final":
        for where, seen, what in found_then[:2]:
            if seen is None:
                yield warning(
                    "review-finding-not-recorded",
                    where,
                    f"whether there is {what} is not recorded: the audit cannot count this "
                    "review for it",
                    "a review records the complications audited after capsulotomy",
                    source=STEINBERG,
                )
    iop = review.iop
    if (
        iop is not None
        and iop.value_mmhg >= t.iop_high_mmhg.value
        and f.raised_iop_needing_treatment is None
    ):
        yield warning(
            "review-iop-high",
            "findings.raised_iop_needing_treatment",
            f"IOP of {iop.value_mmhg:g} mmHg at the review, and whether it needs "
            "treatment is not recorded",
            f"an IOP of {t.iop_high_mmhg.value:g} mmHg or more is treated or explained",
            value=iop.value_mmhg,
            allowed=f"< {t.iop_high_mmhg.value:g} mmHg",
            source=t.iop_high_mmhg.source,
        )
    poor = review.opening.patent is False or review.opening.adequate is False
    if poor and review.retreatment_needed is None:
        yield warning(
            "opening-poor-retreatment-unrecorded",
            "retreatment_needed",
            "the opening is not patent or not adequate, and whether re-treatment is needed "
            "is not recorded",
            "a closed or too small opening is re-treated or the reason recorded",
            source=COMMON_PRACTICE,
        )
    if review.symptoms_relieved is False and discharged and review.retreatment_needed is not True:
        yield warning(
            "symptoms-not-relieved-discharged",
            "symptoms_relieved",
            "the symptoms were not relieved, and the patient was discharged without re-treatment",
            "unrelieved symptoms after capsulotomy are explained (CMO, IOL pits, another "
            "cause) before discharge",
            source=COMMON_PRACTICE,
        )
    if f.iol_pits_troublesome is True:
        yield information(
            "iol-pits-troublesome",
            "findings.iol_pits_troublesome",
            "IOL pits trouble the patient",
            "pits on the visual axis can cause lasting glare and halos",
            source=COMMON_PRACTICE,
        )
