"""The review visit over the REST API, on a real SQLite file and a real PostgreSQL server:
store, resend, conflict, amend with If-Match, void, the reviews of a session, and the checks
that keep a review with its own session's patient and eye (capnote.rules.review)."""

from __future__ import annotations

import copy
import json
from typing import Any

import httpx
import orjson
import pytest

from tests.conftest import Api, routine

SESSION = routine()  # the routine right-eye note, 27 November 2026 at 10:05 UTC
CLINICIAN = {
    "identifier": {"system": "https://harbourside-eye.example/fhir/sid/staff", "value": "S-9"},
    "name": "Dr Invented Reviewer",
}


def review(**changes: Any) -> dict[str, Any]:
    """An attended, signed review of the routine session, three days later."""
    body: dict[str, Any] = {
        "review_id": {"system": "https://harbourside-eye.example/fhir/sid/review", "value": "RV-1"},
        "session": copy.deepcopy(SESSION["note_id"]),
        "patient": copy.deepcopy(SESSION["patient"]),
        "eye": SESSION["eye"],
        "attended": True,
        "seen_at": "2026-11-30T09:00:00+00:00",
        "seen_by": CLINICIAN,
        "visual_acuity": {"notation": "snellen-metric", "value": "6/9", "correction": "habitual"},
        "iop": {"value_mmhg": 16, "method": "applanation"},
        "opening": {"patent": True, "adequate": True},
        "symptoms_relieved": True,
        "findings": {"cystoid_macular_oedema": False, "retinal_detachment": False},
        "retreatment_needed": False,
        "outcome": "discharged",
        "status": "final",
    }
    body.update(changes)
    return body


def post(
    api: Api, path: str, body: object, role: str = "clinician", **headers: str
) -> httpx.Response:
    return api.client.post(path, content=orjson.dumps(body), headers=api.headers(role, **headers))


@pytest.fixture
def session_id(api: Api) -> str:
    answer = post(api, "/notes", SESSION)
    assert answer.status_code == 201, answer.text
    key: str = answer.json()["id"]
    return key


def codes(answer: httpx.Response) -> dict[str, str]:
    """Each issue's code (from its details) -> its FHIRPath, from an OperationOutcome."""
    out = {}
    for issue in answer.json()["issue"]:
        code = issue["details"]["coding"][0]["code"]
        out[code] = issue.get("expression", [""])[0]
    return out


def test_a_review_is_stored_read_and_resent_safely(api: Api, session_id: str) -> None:
    created = post(api, "/reviews", review())
    assert created.status_code == 201, created.text
    body = created.json()
    assert body["session_id"] == session_id
    assert body["version"] == 1
    assert body["status"] == "final"
    assert body["accepted"] is True
    assert created.headers["etag"] == 'W/"1"'
    # 6/9 is logMAR log10(9/6) = 0.18 (standard definition; ICO 1984 acuity standard).
    assert body["derived"]["logmar"] == pytest.approx(0.18, abs=0.005)
    # 16 mmHg against the session's pre-laser 15 mmHg (right-routine.json): +1.
    assert body["derived"]["iop_change_from_pre_laser_mmhg"] == pytest.approx(
        16 - SESSION["before"]["iop"]["value_mmhg"]
    )
    assert body["derived"]["days_after_session"] == 2
    # What nobody recorded stays unrecorded: no false is filled in.
    assert "anterior_uveitis" not in body["review"]["findings"]
    assert body["review"]["findings"]["retinal_detachment"] is False

    again = post(api, "/reviews", review())
    assert again.status_code == 200
    assert again.json()["version"] == 1
    other = post(api, "/reviews", review(symptoms_relieved=False))
    assert other.status_code == 409

    read = api.client.get(f"/reviews/{body['id']}", headers=api.headers("auditor"))
    assert read.status_code == 200
    assert read.json()["review"] == body["review"]
    listed = api.client.get(f"/notes/{session_id}/reviews", headers=api.headers("analyst"))
    assert listed.status_code == 200
    assert [(r["id"], r["attended"], r["outcome"]) for r in listed.json()["reviews"]] == [
        (body["id"], True, "discharged")
    ]


def test_a_review_never_moves_to_another_patient_or_eye(api: Api, session_id: str) -> None:
    other_patient = review(patient={"system": SESSION["patient"]["system"], "value": "HX999999"})
    answer = post(api, "/reviews", other_patient)
    assert answer.status_code == 422
    assert codes(answer)["patient-mismatch"] == "patient"
    # The message names the mismatch, never whom.
    assert "HX999999" not in answer.text
    assert SESSION["patient"]["value"] not in answer.text
    answer = post(api, "/reviews", review(eye="left"))
    assert answer.status_code == 422
    assert codes(answer)["eye-mismatch"] == "eye"
    unknown = review(session={"system": SESSION["note_id"]["system"], "value": "LN-NOPE"})
    answer = post(api, "/reviews", unknown)
    assert answer.status_code == 422
    assert "session-unknown" in codes(answer)


def test_times_and_contradictions_are_refused_with_their_field(api: Api, session_id: str) -> None:
    early = post(api, "/reviews", review(seen_at="2026-11-26T09:00:00+00:00"))
    assert early.status_code == 422
    assert codes(early)["review-before-session"] == "seen_at"
    future = post(api, "/reviews", review(seen_at="2026-12-20T09:00:00+00:00"))
    assert codes(future)["review-in-future"] == "seen_at"
    pits = post(api, "/reviews", review(findings={"iol_pits": False, "iol_pits_troublesome": True}))
    assert codes(pits)["pits-trouble-without-pits"] == "findings.iol_pits_troublesome"
    missed = review(attended=False)
    missed.pop("seen_by")
    answer = post(api, "/reviews", missed)
    assert answer.status_code == 422
    assert codes(answer)["missed-review-has-findings"]
    unsigned = review()
    del unsigned["outcome"]
    assert codes(post(api, "/reviews", unsigned))["required-to-sign"] == "outcome"
    wrong_type = post(api, "/reviews", review(attended="yes"))
    assert wrong_type.status_code == 422
    assert "attended" in wrong_type.text


def test_a_missed_review_records_only_that_it_was_missed(api: Api, session_id: str) -> None:
    missed = {
        k: v
        for k, v in review(attended=False).items()
        if k in ("review_id", "session", "patient", "eye", "attended", "seen_at", "status")
    }
    answer = post(api, "/reviews", missed)
    assert answer.status_code == 201, answer.text
    assert answer.json()["review"]["attended"] is False
    listed = api.client.get(f"/notes/{session_id}/reviews", headers=api.headers("clinician"))
    assert [(r["attended"], r["outcome"]) for r in listed.json()["reviews"]] == [(False, None)]


def test_warnings_do_not_block_and_name_their_source(api: Api, session_id: str) -> None:
    body = review(
        findings={"retinal_detachment": True},
        iop={"value_mmhg": 31, "method": "applanation"},
    )
    answer = post(api, "/reviews", body)
    assert answer.status_code == 201, answer.text
    found = {f["code"]: f for f in answer.json()["findings"]}
    assert found["complication-discharged"]["severity"] == "warning"
    # CMO not recorded: the audit cannot count this review for it (Steinberg et al. 1991).
    assert "Steinberg" in found["review-finding-not-recorded"]["source"]
    assert found["review-iop-high"]["location"] == "findings.raised_iop_needing_treatment"


def test_amend_needs_if_match_and_a_reason_and_void_says_so(api: Api, session_id: str) -> None:
    created = post(api, "/reviews", review()).json()
    key = created["id"]
    change = {
        "reason": "CMO seen on OCT after the visit",
        "review": review(
            findings={"cystoid_macular_oedema": True, "retinal_detachment": False},
            outcome="further-follow-up",
            follow_up_days=28,
        ),
    }
    put = api.client.put(
        f"/reviews/{key}", content=orjson.dumps(change), headers=api.headers("clinician")
    )
    assert put.status_code == 428
    stale = api.client.put(
        f"/reviews/{key}",
        content=orjson.dumps(change),
        headers=api.headers("clinician", **{"if-match": 'W/"7"'}),
    )
    assert stale.status_code == 412
    no_reason = {"review": change["review"]}
    answer = api.client.put(
        f"/reviews/{key}",
        content=orjson.dumps(no_reason),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert answer.status_code == 422
    done = api.client.put(
        f"/reviews/{key}",
        content=orjson.dumps(change),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert done.status_code == 200, done.text
    assert done.json()["version"] == 2
    assert done.json()["review"]["findings"]["cystoid_macular_oedema"] is True
    void = api.client.post(
        f"/reviews/{key}/void",
        content=orjson.dumps({"reason": "recorded against the wrong visit"}),
        headers=api.headers("clinician", **{"if-match": 'W/"2"'}),
    )
    assert void.status_code == 200, void.text
    assert void.json()["status"] == "void"
    versions = api.client.get(f"/reviews/{key}/versions", headers=api.headers("auditor")).json()
    assert [v["status"] for v in versions["versions"]] == ["final", "final", "void"]
    again = api.client.put(
        f"/reviews/{key}",
        content=orjson.dumps(change),
        headers=api.headers("clinician", **{"if-match": 'W/"3"'}),
    )
    assert again.status_code == 409


def test_roles(api: Api, session_id: str) -> None:
    assert post(api, "/reviews", review(), role="analyst").status_code == 403
    assert post(api, "/reviews", review(), role="auditor").status_code == 403
    assert post(api, "/reviews/check", review(), role="analyst").status_code == 200
    assert api.client.post("/reviews", content=orjson.dumps(review())).status_code == 401


def _review_request_status(bundle: dict[str, Any]) -> str:
    [status] = [
        e["resource"]["status"]
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "ServiceRequest"
        and e["resource"]["code"]["coding"][0]["code"] == "capsulotomy-review"
    ]
    return str(status)


def test_a_session_amended_after_its_review_keeps_the_review_done(
    api: Api, session_id: str
) -> None:
    def amend(version: int, reason: str) -> dict[str, Any]:
        note = copy.deepcopy(SESSION)
        note["assistant"] = reason
        answer = api.client.put(
            f"/notes/{session_id}",
            content=orjson.dumps({"reason": reason, "note": note}),
            headers=api.headers("clinician", **{"if-match": f'W/"{version}"'}),
        )
        assert answer.status_code == 200, answer.text
        bundle: dict[str, Any] = answer.json()["bundle"]
        return bundle

    # Before any review, the review is still owed.
    assert _review_request_status(amend(1, "Nurse Invented One")) == "active"
    assert post(api, "/reviews", review()).status_code == 201
    # The review made version 3 of the session (its request completed); an amendment of the
    # session after a signed, attended review does not reopen it.
    assert _review_request_status(amend(3, "Nurse Invented Two")) == "completed"


def test_review_reads_changes_and_refusals_are_in_the_audit_trail(
    api: Api, session_id: str
) -> None:
    from tests.fhir_r4_check import r4_problems

    key = post(api, "/reviews", review()).json()["id"]
    api.client.get(f"/reviews/{key}", headers=api.headers("analyst"))
    post(api, "/reviews", review(symptoms_relieved=False))  # 409: refused, recorded
    post(api, "/reviews/check", review(), role="analyst")  # reads nothing stored
    events = api.client.get("/fhir/AuditEvent", headers=api.headers("auditor"))
    assert events.status_code == 200
    bundle = events.json()
    assert r4_problems(bundle) == []
    recent = [e["resource"] for e in bundle["entry"]][:3]
    assert [(r["subtype"][0]["code"], r["action"], r["outcome"]) for r in recent] == [
        ("create", "C", "4"),
        ("read", "R", "0"),
        ("create", "C", "0"),
    ]
    # Named as the review record it is, never as a Procedure.
    stored = recent[2]["entity"][0]["what"]
    assert stored == {
        "identifier": {"system": "https://capnote.org/fhir/sid/review-record", "value": key}
    }
    assert recent[2]["entity"][0]["detail"] == [{"type": "version", "valueString": "1"}]
    assert SESSION["patient"]["value"] not in json.dumps(bundle)


def _review_request(answer: httpx.Response) -> dict[str, Any]:
    [found] = [
        e["resource"]
        for e in answer.json()["bundle"]["entry"]
        if e["resource"]["resourceType"] == "ServiceRequest"
    ]
    return found


def test_a_missed_review_amended_later_never_reopens_a_completed_review(
    api: Api, session_id: str
) -> None:
    missed = review(
        review_id={"system": "https://harbourside-eye.example/fhir/sid/review", "value": "RV-0"},
        seen_at="2026-11-29T09:00:00+00:00",
        attended=False,
        seen_by=None,
        visual_acuity=None,
        iop=None,
        opening={},
        symptoms_relieved=None,
        findings={},
        retreatment_needed=None,
        outcome=None,
    )
    first = post(api, "/reviews", missed)
    assert first.status_code == 201, first.text
    assert _review_request(first)["status"] == "active"  # still owed
    seen = post(api, "/reviews", review())
    assert seen.status_code == 201, seen.text
    assert _review_request(seen)["status"] == "completed"
    # The missed record corrected later (a comment added): the review stays done, because
    # another review of the session, signed and attended, completed it.
    body = {"reason": "clerical note", "review": {**missed, "comment": "Rebooked by phone."}}
    amended = api.client.put(
        f"/reviews/{first.json()['id']}",
        content=orjson.dumps(body),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert amended.status_code == 200, amended.text
    assert _review_request(amended)["status"] == "completed"


def _served_request(api: Api, session_id: str) -> dict[str, Any]:
    answer = api.client.get(
        f"/fhir/ServiceRequest/{session_id}-due-review", headers=api.headers("analyst")
    )
    assert answer.status_code == 200, answer.text
    found: dict[str, Any] = answer.json()
    return found


def test_capnotes_own_record_says_the_review_is_done_and_owed_again_after_a_void(
    api: Api, session_id: str
) -> None:
    assert _served_request(api, session_id)["status"] == "active"
    created = post(api, "/reviews", review())
    assert created.status_code == 201, created.text
    # The session gets a version of capnote's own, so that its read API, its searches and
    # its Bundle say what the hospital's record now holds.
    served = _served_request(api, session_id)
    assert served["status"] == "completed"
    assert served["meta"]["versionId"] == "2"
    versions = api.client.get(f"/notes/{session_id}/versions", headers=api.headers("auditor"))
    last = versions.json()["versions"][-1]
    assert last["version"] == 2
    assert "review" in last["reason"]
    patient = f"{SESSION['patient']['system']}|{SESSION['patient']['value']}"
    found = api.client.get(
        "/fhir/ServiceRequest",
        params={"subject:identifier": patient, "status": "completed"},
        headers=api.headers("analyst"),
    )
    assert found.status_code == 200, found.text
    # Its searches find it completed too (the iop recheck was done by a reading in the note).
    ids = [e["resource"]["id"] for e in found.json().get("entry", [])]
    assert f"{session_id}-due-review" in ids
    # The session's Observations did not change: they keep their status.
    note = api.client.get(f"/notes/{session_id}", headers=api.headers("auditor")).json()
    statuses = {
        e["resource"]["status"]
        for e in note["bundle"]["entry"]
        if e["resource"]["resourceType"] == "Observation"
    }
    assert statuses == {"final"}
    # A resend of the review changes nothing more.
    assert post(api, "/reviews", review()).status_code == 200
    assert _served_request(api, session_id)["meta"]["versionId"] == "2"
    voided = api.client.post(
        f"/reviews/{created.json()['id']}/void",
        content=orjson.dumps({"reason": "entered on the wrong visit"}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert voided.status_code == 200, voided.text
    served = _served_request(api, session_id)
    assert served["status"] == "active"
    assert served["meta"]["versionId"] == "3"
    again = api.client.get(
        "/fhir/ServiceRequest",
        params={"subject:identifier": patient, "status": "completed"},
        headers=api.headers("analyst"),
    )
    assert f"{session_id}-due-review" not in [
        e["resource"]["id"] for e in again.json().get("entry", [])
    ]
