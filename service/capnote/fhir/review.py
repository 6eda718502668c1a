"""The review visit's FHIR R4 transaction Bundle: what the review found, and the session's
review request marked done.

What a review says goes out as:

- Observations (category exam) of what was measured or judged: attendance, IOP (coded as
  the session's), the IOP change from the pre-laser reading, visual acuity with its logMAR,
  the opening, whether symptoms are relieved, whether more laser is needed, the outcome;
  each basedOn the session's review ServiceRequest when one was booked;
- one Condition per complication the review looked for: seen is confirmed and active, looked
  for and not seen is refuted, not recorded is not sent at all (never a "no" nobody said);
- the session's review ServiceRequest, updated in place (conditional update on its key):
  completed by a signed, attended review, still active while the review is a draft, missed
  or voided (unless another review of the session completed it).

Keys come from the review's own identifier (KeyMaker.of_record, kind "review"), so a resend
creates nothing new; a later version updates what the receiver holds and withdraws what it
no longer says. SNOMED CT codes for the complications are [memory] in coding.md and are not
sent: the project's CodeSystem names them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from capnote.fhir import codes
from capnote.fhir.bundle import (
    OutputCheck,
    check_output,
    request_of,
    restatused,
    withdrawn_resource,
)
from capnote.fhir.codes import (
    CONDITION_CATEGORY,
    CONDITION_CLINICAL,
    CONDITION_VERIFICATION,
    OBS_CATEGORY,
    RESOURCE_KEY,
    SNOMED,
    coding,
    concept,
    own,
    quantity,
)
from capnote.fhir.common import (
    DEFAULT_RECORD,
    Emitted,
    Entry,
    KeyMaker,
    Version,
    identifier_query,
    key_query,
    keyed,
    keyed_entry,
    reference_to,
    when,
)
from capnote.fhir.narrative import narrative
from capnote.fhir.observations import acuity_coded, iop_code, iop_value, part
from capnote.policy.model import RecordPolicy
from capnote.review import Review

REVIEW_KIND = "review"
# The session's resources a review Bundle touches, by their role in the session's Bundle.
SESSION_REVIEW_REQUEST = "due-review"
SESSION_IOP_BEFORE = "iop-before"
# The role, in a review's Emitted, of the session's review request (not the review's own:
# an amendment of the review never withdraws it).
REQUEST_ROLE = "session-review-request"

_EXAM = concept(coding(OBS_CATEGORY, "exam", codes.OBS_CATEGORY_DISPLAY["exam"]))
_ENCOUNTER_DIAGNOSIS = concept(
    coding(CONDITION_CATEGORY, "encounter-diagnosis", "Encounter Diagnosis")
)
_ACTIVE = concept(coding(CONDITION_CLINICAL, "active", "Active"))
_VERIFICATION = {
    code: concept(coding(CONDITION_VERIFICATION, code, display))
    for code, display in (
        ("confirmed", "Confirmed"),
        ("provisional", "Provisional"),
        ("refuted", "Refuted"),
        ("entered-in-error", "Entered in Error"),
    )
}

# Each complication the review looks for: (field of ReviewFindings, role, code).
_CONDITIONS = (
    ("retinal_detachment", "retinal-detachment", "retinal-detachment"),
    ("cystoid_macular_oedema", "cystoid-macular-oedema", "cystoid-macular-oedema"),
    ("anterior_uveitis", "anterior-uveitis", "anterior-uveitis"),
    ("raised_iop_needing_treatment", "raised-iop", "raised-iop-needing-treatment"),
    ("iol_pits", "iol-pits", "iol-pits"),
)
_OUTCOME = {"discharged": "review-discharged", "further-follow-up": "review-further-follow-up"}


@dataclass(frozen=True, slots=True)
class ReviewDerived:
    """What capnote worked out from the review (capnote.reviews.derived_values)."""

    logmar: float | None = None
    iop_change_mmhg: float | None = None


class ReviewContext:
    """What every resource of one review version shares."""

    def __init__(self, review: Review, version: Version, record: RecordPolicy) -> None:
        self.review = review
        self.keys = KeyMaker.of_record(review.review_id, REVIEW_KIND)
        self.version = version
        self.record = record
        self.subject = reference_to("Patient", review.patient, record)
        seen_by = review.seen_by
        self.performer = (
            [reference_to("Practitioner", seen_by.identifier, record, seen_by.name)]
            if seen_by is not None
            else None
        )
        self.draft = review.status == "draft"
        self.effective = when(review.seen_at)
        self.body_site = concept(
            coding(SNOMED, codes.EYE_STRUCTURE[review.eye], codes.EYE_DISPLAY[review.eye])
        )

    def observation_status(self) -> str:
        """Void wins, then draft; an amendment marks only what it changed (restatused)."""
        if self.version.voided:
            return "entered-in-error"
        return "preliminary" if self.draft else "final"

    def verification(self, seen: bool) -> dict[str, Any]:
        """A Condition's verification status: what the review says, as firmly as it says it
        (a draft's finding is provisional; a finding looked for and not seen is refuted)."""
        if self.version.voided:
            return _VERIFICATION["entered-in-error"]
        if not seen:
            return _VERIFICATION["refuted"]
        return _VERIFICATION["provisional" if self.draft else "confirmed"]


def session_reference(kind: str, key: str, record: RecordPolicy) -> dict[str, Any]:
    """A reference to one of the session's resources, which the receiver holds already: by
    its project key, conditional where the site resolves conditional references."""
    out: dict[str, Any] = {"type": kind, "identifier": {"system": RESOURCE_KEY, "value": key}}
    if record.references == "conditional":
        out = {"reference": f"{kind}?{identifier_query(RESOURCE_KEY, key)}", **out}
    return out


class _Maker:
    def __init__(self, ctx: ReviewContext, based_on: dict[str, Any] | None) -> None:
        self.ctx = ctx
        self.status = ctx.observation_status()
        self.based_on = [based_on] if based_on is not None else None

    def observation(self, role: str, code: dict[str, Any], **content: Any) -> Entry:
        ctx = self.ctx
        key, resource = keyed(ctx, role, "Observation")
        resource["status"] = self.status
        if self.based_on is not None:
            resource["basedOn"] = self.based_on
        resource["category"] = [_EXAM]
        resource["code"] = code
        resource["subject"] = ctx.subject
        resource["effectiveDateTime"] = ctx.effective
        if ctx.performer is not None:
            resource["performer"] = ctx.performer
        resource.update(content)
        resource["bodySite"] = ctx.body_site
        return keyed_entry(key, resource, role)

    def boolean(self, role: str, code: str, value: bool | None) -> list[Entry]:
        if value is None:
            return []  # not recorded: nothing is sent, never a "no"
        return [self.observation(role, concept(own(code)), valueBoolean=value)]


def _observations(
    ctx: ReviewContext, make: _Maker, derived: ReviewDerived, pre_laser: dict[str, Any] | None
) -> list[Entry]:
    review = ctx.review
    attended = "review-attended" if review.attended else "review-did-not-attend"
    out = [
        make.observation(
            "attendance",
            concept(own("review-attendance")),
            valueCodeableConcept=concept(own(attended)),
        )
    ]
    if not review.attended:
        return out  # nobody saw the patient: nothing clinical to say
    if review.iop is not None:
        reading = review.iop
        iop = make.observation("iop", iop_code(review.eye), **iop_value(reading))
        if reading.measured_at is not None:
            iop.resource["effectiveDateTime"] = when(reading.measured_at)
        out.append(iop)
        if derived.iop_change_mmhg is not None and pre_laser is not None:
            out.append(
                make.observation(
                    "iop-change",
                    concept(own("iop-change-from-pre-laser")),
                    valueQuantity=quantity(derived.iop_change_mmhg, "mmHg", "mm[Hg]"),
                    derivedFrom=[iop.reference, pre_laser],
                )
            )
    if review.visual_acuity is not None:
        code, value = acuity_coded(review.eye, review.visual_acuity, derived.logmar)
        out.append(make.observation("acuity", code, **value))
    opening = review.opening
    parts = [
        {"code": concept(own(code)), "valueBoolean": value}
        for code, value in (
            ("opening-patent", opening.patent),
            ("opening-adequate", opening.adequate),
        )
        if value is not None
    ]
    if parts:
        out.append(make.observation("opening", concept(own("opening-at-review")), component=parts))
    out += make.boolean("symptoms", "symptoms-relieved", review.symptoms_relieved)
    out += make.boolean("retreatment", "retreatment-needed", review.retreatment_needed)
    if review.findings.other is not None:
        out.append(
            make.observation(
                "other-finding",
                concept(own("review-other-finding")),
                valueString=review.findings.other,
            )
        )
    if review.outcome is not None:
        extra: dict[str, Any] = {}
        if review.follow_up_days is not None:
            extra["component"] = [
                part("follow-up-interval", quantity(review.follow_up_days, "days", "d"))
            ]
        out.append(
            make.observation(
                "outcome",
                concept(own("review-outcome")),
                valueCodeableConcept=concept(own(_OUTCOME[review.outcome])),
                **extra,
            )
        )
    return out


def _conditions(ctx: ReviewContext, session_day: str | None) -> list[Entry]:
    review = ctx.review
    if not review.attended:
        return []
    found = review.findings
    after = f" of {session_day}" if session_day else ""
    out = []
    for field, role, code in _CONDITIONS:
        seen = getattr(found, field)
        if seen is None:
            continue  # not recorded: no Condition, neither present nor refuted
        key, resource = keyed(ctx, role, "Condition")
        if seen and not ctx.version.voided:
            resource["clinicalStatus"] = _ACTIVE
        resource["verificationStatus"] = ctx.verification(seen)
        resource["category"] = [_ENCOUNTER_DIAGNOSIS]
        resource["code"] = concept(own(code))
        resource["bodySite"] = [ctx.body_site]
        resource["subject"] = ctx.subject
        resource["recordedDate"] = ctx.effective
        if ctx.performer is not None:
            resource["asserter"] = ctx.performer[0]
        said = "Seen" if seen else "Looked for and not seen"
        lines = [f"{said} at the review after the Nd:YAG laser capsulotomy{after}."]
        if field == "iol_pits" and seen and found.iol_pits_troublesome is not None:
            lines.append(
                "The pits trouble the patient (glare, halos)."
                if found.iol_pits_troublesome
                else "The pits do not trouble the patient."
            )
        resource["note"] = [{"text": " ".join(lines)}]
        out.append(keyed_entry(key, resource, role))
    return out


def _session_request(
    ctx: ReviewContext, session: dict[str, Any], reviewed_elsewhere: bool
) -> Entry:
    """The session's review ServiceRequest as this review leaves it."""
    review = ctx.review
    resource = dict(session["resource"])
    done = reviewed_elsewhere or (
        review.attended and review.status == "final" and not ctx.version.voided
    )
    # Not done: owed again, or, for a session not yet signed, still the draft it was.
    owed = "draft" if resource.get("status") == "draft" else "active"
    resource["status"] = "completed" if done else owed
    day = review.seen_at.date().isoformat()
    if done:
        line = "Done: the review visit was recorded."
    elif ctx.version.voided:
        line = f"The review record of {day} was entered in error: the review is still owed."
    elif not review.attended:
        line = f"The patient did not attend the review booked for {day}: still owed."
    else:
        line = f"A review on {day} is recorded as a draft: not yet signed."
    before = [n for n in resource.get("note", ()) if n.get("text")]
    # The session's own text first (why and when it is due), then what the review says; a
    # line from an earlier review version is replaced, never stacked.
    kept = before[:1]
    resource["note"] = [*kept, {"text": line}]
    resource.pop("text", None)
    key = session["fullUrl"].removeprefix("urn:uuid:")
    return Entry(key, resource, key_query(key), REQUEST_ROLE)


def _session_entry(bundle: dict[str, Any] | None, roles: tuple[str, ...], role: str) -> Any:
    if bundle is None:
        return None
    for entry, name in zip(bundle.get("entry", ()), roles, strict=False):
        if name == role:
            return entry
    return None


def emit_review(
    review: Review,
    session_bundle: dict[str, Any] | None,
    session_roles: tuple[str, ...],
    derived: ReviewDerived,
    version: Version,
    record: RecordPolicy | None = None,
    *,
    reviewed_elsewhere: bool = False,
) -> Emitted:
    """The review's transaction Bundle and its entries' roles.

    reviewed_elsewhere: another review of the same session, signed and attended, has
    completed the session's review request already (a missed review amended later must not
    make it owed again)."""
    record = record or DEFAULT_RECORD
    ctx = ReviewContext(review, version, record)
    request = _session_entry(session_bundle, session_roles, SESSION_REVIEW_REQUEST)
    pre = _session_entry(session_bundle, session_roles, SESSION_IOP_BEFORE)
    pre_ref = (
        session_reference("Observation", pre["fullUrl"].removeprefix("urn:uuid:"), record)
        if pre is not None
        else None
    )
    items: list[Entry] = []
    based_on = None
    if request is not None:
        sr = _session_request(ctx, request, reviewed_elsewhere)
        based_on = session_reference("ServiceRequest", sr.key, record)
        items.append(sr)
    procedure = _session_entry(session_bundle, session_roles, "procedure")
    session_day = None
    if procedure is not None:
        performed = procedure["resource"].get("performedPeriod", {}).get("start")
        session_day = str(performed)[:10] if performed else None
    make = _Maker(ctx, based_on)
    items += _observations(ctx, make, derived, pre_ref)
    items += _conditions(ctx, session_day)
    previous = version.previous
    if previous is not None:
        if version.amends_final and review.status == "final" and not version.voided:
            restatused(items, previous)
        kept = {e.key for e in items}
        for entry, role in zip(previous.bundle.get("entry", []), previous.roles, strict=True):
            key = entry["fullUrl"].removeprefix("urn:uuid:")
            if key in kept or role == REQUEST_ROLE:
                continue  # the session's request is the session's: never withdrawn here
            if entry["resource"]["resourceType"] == "Provenance":
                continue
            items.append(Entry(key, withdrawn_resource(entry["resource"]), key_query(key), role))
    for e in items:
        text = narrative(e.resource)
        if text is not None:
            e.resource["text"] = text
    result: dict[str, Any] = {
        "resourceType": "Bundle",
        "identifier": {"system": RESOURCE_KEY, "value": ctx.keys.key("bundle")},
        "type": "transaction",
        "entry": [
            {
                "fullUrl": e.full_url,
                "resource": e.resource,
                # The session's request is on the receiver already: always an update.
                "request": request_of(e, 2 if e.role == REQUEST_ROLE else version.number),
            }
            for e in items
        ],
    }
    check_output(result, items, OutputCheck.BINDINGS)
    return Emitted(result, tuple(e.role for e in items))
