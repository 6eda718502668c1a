"""The note routes on SQLite and PostgreSQL, through the in-process client."""

from __future__ import annotations

import json
from typing import Any

import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError

from capnote.app import create_app
from capnote.config import Settings
from capnote.fhir.bundle import OutputCheck
from tests.conftest import (
    EXAMPLES,
    INVALID,
    NOW,
    ROOT,
    VALID,
    Api,
    new_token,
    revoke_token,
    routine,
)
from tests.fhir_r4_check import r4_problems

ROUTINE = (EXAMPLES / "notes" / "right-routine.json").read_text()


def post(api: Api, body: str | dict[str, Any], role: str = "submitter") -> Any:
    content = body if isinstance(body, str) else json.dumps(body)
    return api.client.post("/notes", content=content, headers=api.headers(role))


def test_submit_answers_201_with_everything(api: Api) -> None:
    r = post(api, ROUTINE)
    assert r.status_code == 201
    body = r.json()
    assert body["version"] == 1
    assert body["accepted"] is True
    assert body["derived"]["total_energy_mj"] == pytest.approx(28.8)
    assert body["due"][-1]["target"].startswith("2026-12-29")  # moved past Christmas
    assert body["outcome"]["resourceType"] == "OperationOutcome"
    assert r4_problems(body["bundle"]) == []  # google-fhir-r4 + core invariants
    assert r.headers["etag"] == 'W/"1"'
    assert r.headers["location"] == f"/notes/{body['id']}"


def test_resend_is_200_and_creates_nothing(api: Api) -> None:
    first = post(api, ROUTINE)
    again = post(api, ROUTINE)
    assert (first.status_code, again.status_code) == (201, 200)
    assert again.json()["id"] == first.json()["id"]
    versions = api.client.get(
        f"/notes/{first.json()['id']}/versions", headers=api.headers("auditor")
    )
    assert len(versions.json()["versions"]) == 1


def test_same_identifier_other_content_is_409_pointing_to_amend(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    r = post(api, changed)
    assert r.status_code == 409
    assert f"PUT /notes/{key}" in r.json()["issue"][0]["diagnostics"]


@pytest.mark.parametrize("path", INVALID, ids=lambda p: p.name)
def test_invalid_notes_answer_422_naming_every_problem(api: Api, path: Any) -> None:
    expected = json.loads((EXAMPLES / "expected" / "invalid.json").read_text())[path.name]
    r = post(api, path.read_text())
    assert r.status_code == 422
    assert r.headers["content-type"].startswith("application/fhir+json")
    issues = r.json()["issue"]
    got = {
        (i["severity"], i["details"]["coding"][0]["code"], (i.get("expression") or [""])[0])
        for i in issues
        if i["severity"] == "error"
    }
    assert got == {tuple(e) for e in expected}


def test_warnings_do_not_block(api: Api) -> None:
    r = post(api, (EXAMPLES / "notes" / "left-glaucoma-no-prophylaxis.json").read_text())
    assert r.status_code == 201
    # Warnings and information only (the 69 mJ total is information by default): no error.
    assert {f["severity"] for f in r.json()["findings"]} == {"warning", "information"}


def test_check_stores_nothing(api: Api) -> None:
    r = api.client.post("/notes/check", content=ROUTINE, headers=api.headers("analyst"))
    assert r.status_code == 200
    assert r.json()["bundle"]["type"] == "transaction"
    assert (
        api.client.get(f"/notes/{r.json()['id']}", headers=api.headers("analyst")).status_code
        == 404
    )
    bad = api.client.post("/notes/check", content="{}", headers=api.headers("analyst"))
    assert bad.status_code == 200
    assert bad.json()["accepted"] is False


def test_amend_versions_and_if_match(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    url = f"/notes/{key}"
    blind = api.client.put(
        url,
        content=json.dumps({"reason": "x", "note": changed}),
        headers=api.headers("clinician"),
    )
    # Without If-Match the last writer would win silently: 428 (RFC 6585), nothing stored.
    assert blind.status_code == 428
    assert blind.json()["issue"][0]["code"] == "required"
    assert "If-Match" in blind.json()["issue"][0]["diagnostics"]
    no_reason = api.client.put(
        url,
        content=json.dumps({"note": changed}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert no_reason.status_code == 422  # a final note is amended only with a reason
    assert no_reason.json()["issue"][0]["expression"] == ["reason"]
    body = json.dumps({"reason": "opening re-measured", "note": changed})
    ok = api.client.put(
        url, content=body, headers=api.headers("clinician", **{"if-match": 'W/"1"'})
    )
    assert ok.status_code == 200
    assert ok.json()["version"] == 2
    stale = api.client.put(
        url,
        content=json.dumps({"reason": "x", "note": routine()}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert stale.status_code == 412
    history = api.client.get(f"{url}/versions", headers=api.headers("auditor")).json()["versions"]
    assert [(v["version"], v["reason"]) for v in history] == [(1, None), (2, "opening re-measured")]
    first = api.client.get(f"{url}/versions/1", headers=api.headers("auditor")).json()
    assert first["note"]["result"]["opening"]["horizontal_mm"] == 4.5  # nothing overwritten
    latest = api.client.get(url, headers=api.headers("auditor"))
    assert latest.headers["etag"] == 'W/"2"'
    observations = [
        e["resource"]
        for e in latest.json()["bundle"]["entry"]
        if e["resource"]["resourceType"] == "Observation"
    ]
    # Only what the amendment changed is marked: the re-measured opening is corrected (R4
    # ObservationStatus), the area worked out from it amended, every other result final.
    status = {o["code"]["coding"][0]["code"]: o["status"] for o in observations}
    assert status.pop("opening-size") == "corrected"
    assert status.pop("opening-area") == "amended"
    assert set(status.values()) == {"final"}
    assert all(e["request"]["method"] == "PUT" for e in latest.json()["bundle"]["entry"])
    assert r4_problems(latest.json()["bundle"]) == []


def test_void_marks_everything_entered_in_error(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    url = f"/notes/{key}/void"
    h = api.headers("submitter", **{"if-match": 'W/"1"'})
    blind = api.client.post(
        url, content=json.dumps({"reason": "wrong patient"}), headers=api.headers("submitter")
    )
    assert blind.status_code == 428  # a void without If-Match is refused like an amend
    assert api.client.post(url, content="{}", headers=h).status_code == 422
    r = api.client.post(url, content=json.dumps({"reason": "wrong patient"}), headers=h)
    assert r.status_code == 200
    assert r.json()["status"] == "void"
    entries = r.json()["bundle"]["entry"]
    statuses = {e["resource"]["status"] for e in entries if "status" in e["resource"]}
    assert statuses == {"entered-in-error"}
    # The void's own record: who voided it, why, as a DELETE over every resource (R4
    # Provenance); it is the one entry without a status.
    [provenance] = [e["resource"] for e in entries if "status" not in e["resource"]]
    assert provenance["resourceType"] == "Provenance"
    assert provenance["activity"]["coding"][0]["code"] == "DELETE"
    assert provenance["reason"] == [{"text": "wrong patient"}]
    assert len(provenance["target"]) == len(entries) - 1
    assert r4_problems(r.json()["bundle"]) == []
    amend = api.client.put(
        f"/notes/{key}",
        content=json.dumps({"reason": "x", "note": routine()}),
        headers=api.headers("submitter", **{"if-match": 'W/"2"'}),
    )
    assert amend.status_code == 409


def test_cumulative_energy_over_sessions_on_one_eye(api: Api) -> None:
    first = routine()
    second = routine()
    second["note_id"]["value"] = "LN-2026-0999"
    for key in ("started_at", "ended_at"):
        second[key] = second[key].replace("2026-11-27", "2026-11-30")
    second["result"]["iop_after"][0]["measured_at"] = "2026-11-30T11:15:00+00:00"
    second["before"]["iop"]["measured_at"] = "2026-11-30T09:40:00+00:00"
    second["consent"]["recorded_at"] = "2026-11-30T09:50:00+00:00"
    other_eye = json.loads(json.dumps(second))
    other_eye["note_id"]["value"] = "LN-2026-1000"
    other_eye["eye"] = "left"
    assert post(api, first).status_code == 201
    assert post(api, other_eye).status_code == 201
    r = post(api, second)
    assert r.status_code == 201
    cumulative = r.json()["derived"]["cumulative"]
    assert cumulative == {
        "session_number": 2,
        "cumulative_energy_mj": 57.6,
        "days_since_last_session": 3,
    }


def test_list_notes_by_patient_and_eye(api: Api) -> None:
    for path in VALID:
        assert post(api, path.read_text()).status_code == 201
    patient = routine()["patient"]
    r = api.client.get(
        "/notes",
        params={"patient": f"{patient['system']}|{patient['value']}"},
        headers=api.headers("analyst"),
    )
    assert r.status_code == 200
    assert r.json()["total"] == 1
    none = api.client.get(
        "/notes",
        params={"patient": f"{patient['system']}|{patient['value']}", "eye": "left"},
        headers=api.headers("analyst"),
    )
    assert none.json()["total"] == 0
    bad = api.client.get("/notes", params={"patient": "no-bar"}, headers=api.headers("analyst"))
    assert bad.status_code == 422
    assert bad.json()["resourceType"] == "OperationOutcome"


@pytest.mark.parametrize(
    ("method", "url", "role", "status"),
    [
        ("post", "/notes", None, 401),
        ("post", "/notes", "analyst", 403),
        ("post", "/notes", "auditor", 403),
        ("post", "/notes/check", "auditor", 403),
        ("get", "/audit", "submitter", 403),
        ("get", "/audit", "auditor", 200),
        ("get", "/notes/unknown", "auditor", 404),
        ("get", "/fhir/metadata", None, 200),
        ("get", "/healthz", None, 200),
        ("get", "/readyz", None, 200),
    ],
)
def test_roles(api: Api, method: str, url: str, role: str | None, status: int) -> None:
    r = getattr(api.client, method)(
        url, headers=api.headers(role), **({"content": ROUTINE} if method == "post" else {})
    )
    assert r.status_code == status
    if status >= 400:
        assert r.json()["resourceType"] == "OperationOutcome"


def test_wrong_and_revoked_tokens_are_401(api: Api) -> None:
    r = api.client.get("/notes/x", headers={"authorization": "Bearer cap_not-a-token"})
    assert r.status_code == 401
    assert r.headers["www-authenticate"].startswith("Bearer")


@pytest.mark.parametrize(
    ("headers", "body", "status"),
    [
        ({"content-type": "text/plain"}, ROUTINE, 415),
        ({}, "{not json", 422),
        ({}, "[]", 422),
        ({}, "x" * 2_000_000, 413),
    ],
)
def test_bad_bodies_get_4xx_outcomes(
    api: Api, headers: dict[str, str], body: str, status: int
) -> None:
    r = api.client.post("/notes", content=body, headers={**api.headers("submitter"), **headers})
    assert r.status_code == status
    assert r.json()["resourceType"] == "OperationOutcome"


def test_audit_trail_records_writes(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    api.client.post(
        f"/notes/{key}/void",
        content=json.dumps({"reason": "duplicate"}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    entries = api.client.get("/audit", params={"note": key}, headers=api.headers("auditor")).json()[
        "entries"
    ]
    assert [(e["action"], e["role"], e["version"]) for e in entries] == [
        ("void", "clinician", 2),
        ("create", "submitter", 1),
    ]
    text = json.dumps(entries)
    assert routine()["patient"]["value"] not in text  # identifiers only, no patient data


def test_openapi_documents_bodies_and_errors(api: Api) -> None:
    spec = api.client.get("/openapi.json").json()
    post_notes = spec["paths"]["/notes"]["post"]
    assert post_notes["requestBody"]["content"]["application/json"]["schema"] == {
        "$ref": "#/components/schemas/Note"
    }
    assert "right-routine" in post_notes["requestBody"]["content"]["application/json"]["examples"]
    assert {"201", "200", "409", "422", "401", "403"} <= set(post_notes["responses"])
    assert "Note" in spec["components"]["schemas"]


def amend(
    api: Api,
    key: str,
    note: dict[str, Any],
    reason: str | None = "fix",
    if_match: str | None = 'W/"1"',
    **extra: Any,
) -> Any:
    body: dict[str, Any] = {"note": note, **extra}
    if reason is not None:
        body["reason"] = reason
    headers = api.headers("clinician", **({"if-match": if_match} if if_match else {}))
    return api.client.put(f"/notes/{key}", content=json.dumps(body), headers=headers)


def test_a_retried_amendment_answers_the_stored_version(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    first = amend(api, key, changed, if_match='W/"1"')
    again = amend(api, key, changed, if_match='W/"1"')  # the client never saw the answer
    assert (first.status_code, again.status_code) == (200, 200)
    assert again.json()["version"] == 2


def test_a_retried_void_answers_the_void(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    url, body = f"/notes/{key}/void", json.dumps({"reason": "wrong eye"})
    h = api.headers("clinician", **{"if-match": 'W/"1"'})
    assert api.client.post(url, content=body, headers=h).status_code == 200
    again = api.client.post(url, content=body, headers=h)
    assert again.status_code == 200
    assert again.json()["status"] == "void"


def test_an_amendment_withdraws_what_it_drops(api: Api) -> None:
    note = json.loads((EXAMPLES / "notes" / "left-glaucoma-no-prophylaxis.json").read_text())
    key = post(api, note).json()["id"]
    note["before"]["risk_factors"]["glaucoma"] = "none"
    note["plan"]["take_home"] = []
    r = amend(api, key, note, reason="glaucoma was entered on the wrong patient")
    assert r.status_code == 200
    resources = {
        e["resource"]["resourceType"] + ":" + e["resource"]["code"].get("text", "")
        if "code" in e["resource"]
        else e["resource"]["resourceType"]: e
        for e in r.json()["bundle"]["entry"]
    }
    next_day = resources["ServiceRequest:Next-day IOP check"]
    assert next_day["resource"]["status"] == "revoked"
    assert next_day["request"]["method"] == "PUT"
    dropped = [
        e
        for e in r.json()["bundle"]["entry"]
        if e["resource"]["resourceType"] == "MedicationRequest"
    ]
    assert [e["resource"]["status"] for e in dropped] == ["cancelled"]
    assert r4_problems(r.json()["bundle"]) == []


def test_draft_then_final_is_final_not_amended(api: Api) -> None:
    draft = routine()
    draft["status"] = "draft"
    key = post(api, draft).json()["id"]
    signed = amend(api, key, routine(), reason=None)  # no reason needed to sign a draft
    assert signed.status_code == 200
    observations = [
        e["resource"]
        for e in signed.json()["bundle"]["entry"]
        if e["resource"]["resourceType"] == "Observation"
    ]
    assert {o["status"] for o in observations} == {"final"}
    back = routine()
    back["status"] = "draft"
    refused = amend(api, key, back, reason="undo", if_match='W/"2"')
    assert refused.status_code == 422
    assert refused.json()["issue"][0]["expression"] == ["note.status"]


@pytest.mark.parametrize(
    ("extra", "reason", "location"),
    [({"colour": "red"}, "fix", "colour"), ({}, "x" * 501, "reason"), ({}, "two\nlines", "reason")],
)
def test_amend_body_is_checked_as_documented(
    api: Api, extra: dict[str, Any], reason: str, location: str
) -> None:
    key = post(api, ROUTINE).json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    r = amend(api, key, changed, reason=reason, **extra)
    assert r.status_code == 422
    assert r.json()["issue"][0]["expression"] == [location]


def test_a_note_cannot_be_moved_to_another_patient(api: Api) -> None:
    # Moving a note would move its results between charts at every receiver (issue 14):
    # the way is to void it with a reason and send a new note.
    key = post(api, ROUTINE).json()["id"]
    moved = routine()
    moved["patient"]["value"] = "HX777777"
    refused = amend(api, key, moved, reason="wrong patient chosen")
    assert refused.status_code == 422
    issue = refused.json()["issue"][0]
    assert issue["expression"] == ["note.patient"]
    assert "void this note with a reason" in issue["diagnostics"]
    assert "HX777777" not in refused.text  # no patient identifier in an error
    system = moved["patient"]["system"]
    h = api.headers("analyst")
    old = api.client.get("/notes", params={"patient": f"{system}|HX100234"}, headers=h).json()
    new = api.client.get("/notes", params={"patient": f"{system}|HX777777"}, headers=h).json()
    assert (old["total"], new["total"]) == (1, 0)


def test_upper_case_ids_name_the_same_note(api: Api) -> None:
    key = post(api, ROUTINE).json()["id"]
    assert (
        api.client.get(f"/notes/{key.upper()}", headers=api.headers("analyst")).status_code == 200
    )
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    assert amend(api, key.upper(), changed).status_code == 200


def test_naive_dates_in_a_listing_are_refused(api: Api) -> None:
    r = api.client.get(
        "/notes",
        params={"patient": "a|b", "from": "2026-11-01T00:00:00"},
        headers=api.headers("analyst"),
    )
    assert r.status_code == 422


def test_a_revoked_token_is_401(api: Api) -> None:
    token, token_id = new_token(api.url, "submitter", "leaving")
    assert revoke_token(api.url, token_id)
    r = api.client.get("/notes/x", headers={"authorization": f"Bearer {token}"})
    assert r.status_code == 401


def test_the_r4b_output_check_setting_serves_the_same_notes(database_url: str) -> None:
    # CAPNOTE_OUTPUT_CHECK=r4b: every Bundle also through the fhir.resources R4B models
    # before it is stored; valid notes are stored as with the default check.
    app = create_app(
        Settings(database_url=database_url, output_check=OutputCheck.R4B), clock=lambda: NOW
    )
    token, _ = new_token(database_url, "submitter", "r4b")
    with TestClient(app) as client:
        r = client.post(
            "/notes",
            content=VALID[0].read_bytes(),
            headers={"authorization": f"Bearer {token}", "content-type": "application/json"},
        )
    assert r.status_code == 201
    assert r.json()["bundle"]["type"] == "transaction"


def test_an_unknown_output_check_is_refused() -> None:
    with pytest.raises(ValidationError):
        Settings(output_check="everything")  # type: ignore[arg-type]


def answers_validator(name: str) -> Any:
    """A validator for one answer of the published schemas/answers.schema.json."""
    from jsonschema import Draft202012Validator

    schema = json.loads((ROOT / "schemas" / "answers.schema.json").read_text())
    return Draft202012Validator({**schema, "$ref": f"#/$defs/{name}"})


def test_every_answer_has_the_published_shape(api: Api) -> None:
    # An independent validator (jsonschema) against the committed file: a field renamed
    # inside capnote fails here rather than changing the API silently.
    created = post(api, ROUTINE)
    key = created.json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    patient = routine()["patient"]
    h = api.headers("auditor")
    answers = {
        "NoteAnswer": [
            created.json(),
            api.client.get(f"/notes/{key}", headers=h).json(),
            amend(api, key, changed, reason="re-measured").json(),
        ],
        "CheckAnswer": [
            api.client.post("/notes/check", content=ROUTINE, headers=api.headers("analyst")).json(),
        ],
        "NoteListAnswer": [
            api.client.get(
                "/notes", params={"patient": f"{patient['system']}|{patient['value']}"}, headers=h
            ).json()
        ],
        "VersionsAnswer": [api.client.get(f"/notes/{key}/versions", headers=h).json()],
        "DeliveryAnswer": [api.client.get(f"/notes/{key}/delivery", headers=h).json()],
        "AuditAnswer": [api.client.get("/audit", headers=h).json()],
        "StatusAnswer": [api.client.get("/readyz").json()],
    }
    for name, bodies in answers.items():
        validator = answers_validator(name)
        for body in bodies:
            assert [e.message for e in validator.iter_errors(body)] == [], name
    # And the OpenAPI document names the same shapes.
    spec = api.client.get("/openapi.json").json()
    created_schema = spec["paths"]["/notes"]["post"]["responses"]["201"]["content"]
    assert created_schema["application/json"]["schema"] == {
        "$ref": "#/components/schemas/NoteAnswer"
    }
    assert {"bundle", "resources", "due"} <= set(
        spec["components"]["schemas"]["NoteAnswer"]["properties"]
    )


@pytest.mark.parametrize("if_match", ['W/"²"', '"¹"', 'W/"1 "', 'W/"99999999999"', 'W/"-1"'])
def test_if_match_takes_ascii_digits_only(api: Api, if_match: str) -> None:
    """A superscript digit passes str.isdigit() and then breaks int(): refused as the
    caller's mistake, never a 500 (found by the security tester)."""
    key = post(api, ROUTINE).json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    # Header bytes are read as Latin-1 (the ASGI rule), so byte 0xB2 arrives as "²".
    headers: dict[str, Any] = {**api.headers("clinician"), "if-match": if_match.encode("latin-1")}
    body = json.dumps({"note": changed, "reason": "fix"})
    r = api.client.put(f"/notes/{key}", content=body, headers=headers)
    assert r.status_code == 422, r.text
    [issue] = r.json()["issue"]
    assert issue["expression"] == ["If-Match"]
    assert api.client.get(f"/notes/{key}", headers=api.headers("clinician")).json()["version"] == 1
