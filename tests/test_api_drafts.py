"""Drafts that are not whole yet, and the form's worklist, on SQLite and PostgreSQL.

A draft is kept as typed once it names its note number, patient, eye and session start: its
findings come back (errors included) but do not block saving; it makes no FHIR resources,
no outbox entry and no session in the eye's totals until a version passes the contract.
"""

from __future__ import annotations

import copy
import json
from typing import Any

import pytest

from capnote.drafts import DraftIdentity, draft_key
from capnote.note import Note
from capnote.notes import Principal, note_key
from tests.conftest import NOW, Api, routine, sync_notes
from tests.fhir_receiver import Store as Receiving
from tests.fhir_receiver import running
from tests.test_delivery import Clock, drain, worker_for


def bare_draft(**over: Any) -> dict[str, Any]:
    """Only what identifies a draft, and an IOP reading: what a clinician has typed first."""
    whole = routine()
    draft: dict[str, Any] = {
        "note_id": {"system": whole["note_id"]["system"], "value": "LN-DRAFT-1"},
        "patient": whole["patient"],
        "eye": "right",
        "started_at": "2026-12-01T09:30:00+00:00",
        "before": {"iop": {"value_mmhg": 16, "method": "applanation"}},
        "status": "draft",
    }
    draft.update(over)
    return draft


def whole_of(draft: dict[str, Any]) -> dict[str, Any]:
    """The routine example under the draft's note number, patient, eye and start."""
    note = routine()
    for key in ("note_id", "patient", "eye", "started_at"):
        note[key] = copy.deepcopy(draft[key])
    note["ended_at"] = "2026-12-01T09:40:00+00:00"
    note["consent"]["recorded_at"] = "2026-12-01T09:20:00+00:00"
    note["before"]["iop"]["measured_at"] = "2026-12-01T09:15:00+00:00"
    for reading in note["result"]["iop_after"]:
        reading["measured_at"] = "2026-12-01T10:40:00+00:00"
    return note


def post(api: Api, body: dict[str, Any], role: str = "clinician") -> Any:
    return api.client.post("/notes", content=json.dumps(body), headers=api.headers(role))


def put(api: Api, key: str, note: dict[str, Any], version: int, **extra: Any) -> Any:
    return api.client.put(
        f"/notes/{key}",
        content=json.dumps({"note": note, **extra}),
        headers=api.headers("clinician", **{"if-match": f'W/"{version}"'}),
    )


def test_a_draft_with_only_patient_eye_and_time_is_saved_with_its_findings(api: Api) -> None:
    r = post(api, bare_draft())
    assert r.status_code == 201, r.text
    body = r.json()
    assert body["status"] == "draft"
    assert body["accepted"] is False
    assert body["bundle"] is None
    assert body["resources"] == []
    assert body["derived"] is None
    codes = {(f["code"], f["location"]) for f in body["findings"] if f["severity"] == "error"}
    # What is still missing is listed, not refused.
    assert ("missing-field", "performer") in codes
    assert ("missing-field", "laser") in codes
    assert body["note"]["before"]["iop"]["value_mmhg"] == 16
    # Read back from the server, as another tab or a reload does.
    again = api.client.get(f"/notes/{body['id']}", headers=api.headers("clinician"))
    assert again.status_code == 200
    assert again.json()["note"] == body["note"]
    assert again.headers["etag"] == 'W/"1"'
    # The same draft sent again is a resend: nothing new.
    assert post(api, bare_draft()).status_code == 200


@pytest.mark.parametrize(
    ("drop", "location"),
    [("patient", "patient"), ("eye", "eye"), ("started_at", "started_at"), ("note_id", "note_id")],
)
def test_a_draft_without_what_identifies_it_is_refused_naming_that_field(
    api: Api, drop: str, location: str
) -> None:
    draft = bare_draft()
    del draft[drop]
    r = post(api, draft)
    assert r.status_code == 422
    issues = r.json()["issue"]
    # Only the identifying field is named: the rest of a draft may still be missing.
    assert [(i.get("expression") or [""])[0] for i in issues] == [location]


@pytest.mark.parametrize(
    "start", ["0045-09-06T09:25:44Z", "1979-12-31T23:59:59Z", "2200-01-01T00:00:00Z"]
)
def test_a_draft_starting_outside_the_years_of_the_laser_is_refused(api: Api, start: str) -> None:
    # The stores cannot keep every year (SQLite's text dates need four digits), and no
    # capsulotomy with this laser predates 1980 (from memory).
    r = post(api, bare_draft(started_at=start))
    assert r.status_code == 422
    [issue] = r.json()["issue"]
    assert issue["expression"] == ["started_at"]


def test_a_final_note_with_errors_is_still_refused(api: Api) -> None:
    r = post(api, bare_draft(status="final"))
    assert r.status_code == 422
    assert len(r.json()["issue"]) > 5


def test_a_kept_draft_emits_nothing_and_counts_in_no_totals(database_url: str) -> None:
    service = sync_notes(database_url, lambda: NOW, forward=True)
    try:
        who = Principal("dr test", "clinician")
        _created, kept = service.submit(json.dumps(bare_draft()).encode(), who)
        assert kept.bundle_json == b"null"
        assert service.run(service.store.outbox(None, 100)) == []
        # A whole note of the same eye later that day: the kept draft is no earlier session.
        other = routine()
        other["note_id"]["value"] = "LN-OTHER"
        other["started_at"] = "2026-12-01T11:00:00+00:00"
        other["ended_at"] = "2026-12-01T11:10:00+00:00"
        other["consent"]["recorded_at"] = "2026-12-01T10:50:00+00:00"
        other["before"]["iop"]["measured_at"] = "2026-12-01T10:45:00+00:00"
        for reading in other["result"]["iop_after"]:
            reading["measured_at"] = "2026-12-01T12:00:00+00:00"
        _c, whole = service.submit(json.dumps(other).encode(), who)
        assert whole.view()["derived"]["cumulative"]["session_number"] == 1
        assert len(service.run(service.store.outbox(None, 100))) == 1
    finally:
        service.close()


def test_a_kept_draft_becomes_whole_then_signed_and_only_then_is_emitted(api: Api) -> None:
    first = post(api, bare_draft()).json()
    key = first["id"]
    more = bare_draft(performer={"identifier": {"system": "urn:x", "value": "S1"}})
    second = put(api, key, more, 1)
    assert second.status_code == 200, second.text
    assert (second.json()["version"], second.json()["bundle"]) == (2, None)
    # Stale If-Match: 412, as for any amendment.
    assert put(api, key, bare_draft(), 1).status_code == 412
    # Moving the draft to the other eye is refused as for any note.
    moved = put(api, key, bare_draft(eye="left"), 2)
    assert moved.status_code == 422
    assert moved.json()["issue"][0]["expression"] == ["note.eye"]
    whole = whole_of(bare_draft())
    whole["status"] = "draft"
    third = put(api, key, whole, 2)
    assert third.status_code == 200, third.text
    body = third.json()
    assert body["accepted"] is True
    assert body["bundle"]["type"] == "transaction"
    # The first version the record sees is conditional (it updates or creates), whatever
    # its number: nothing of versions 1 and 2 was ever sent.
    assert body["bundle"]["entry"][0]["request"]["method"] == "PUT"
    whole["status"] = "final"
    signed = put(api, key, whole, 3)
    assert signed.status_code == 200
    assert signed.json()["status"] == "final"
    # Once in the record, a version with errors is refused again.
    assert put(api, key, {**bare_draft(), "status": "final"}, 4, reason="x").status_code == 422
    versions = api.client.get(f"/notes/{key}/versions", headers=api.headers("clinician"))
    assert [v["status"] for v in versions.json()["versions"]] == ["draft"] * 3 + ["final"]
    fhir = api.client.get(f"/fhir/Procedure/{key}", headers=api.headers("clinician"))
    assert fhir.status_code == 200


def test_a_kept_draft_can_be_voided_and_not_amended_after(api: Api) -> None:
    key = post(api, bare_draft()).json()["id"]
    r = api.client.post(
        f"/notes/{key}/void",
        content=json.dumps({"reason": "wrong patient"}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert r.status_code == 200, r.text
    assert (r.json()["status"], r.json()["reason"], r.json()["bundle"]) == (
        "void",
        "wrong patient",
        None,
    )
    assert put(api, key, bare_draft(), 2).status_code == 409


def test_the_draft_key_is_the_whole_notes_key() -> None:
    note = Note.model_validate_json(json.dumps(routine()))
    identity = DraftIdentity.model_validate_json(json.dumps({**routine(), "status": "draft"}))
    assert draft_key(identity) == note_key(note)


def test_the_worklist_lists_todays_notes_and_my_drafts(api: Api) -> None:
    mine = post(api, bare_draft()).json()
    old_draft = post(
        api,
        bare_draft(note_id={"system": "urn:x", "value": "OLD"}, started_at="2026-11-20T09:00:00Z"),
    ).json()
    someone_else = post(
        api, bare_draft(note_id={"system": "urn:x", "value": "THEIRS"}), role="submitter"
    ).json()
    r = api.client.get("/notes/worklist", headers=api.headers("clinician"))
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["day"] == "2026-12-01"  # the clock's day in the clinic's zone (London)
    today = {n["id"] for n in body["today"]}
    drafts = {n["id"] for n in body["drafts"]}
    assert today == {mine["id"], someone_else["id"]}
    assert drafts == {mine["id"], old_draft["id"]}
    line = next(n for n in body["drafts"] if n["id"] == mine["id"])
    assert (line["status"], line["accepted"], line["eye"]) == ("draft", False, "right")
    other_day = api.client.get(
        "/notes/worklist?day=2026-11-20", headers=api.headers("clinician")
    ).json()
    assert {n["id"] for n in other_day["today"]} == {old_draft["id"]}
    bad = api.client.get("/notes/worklist?day=2026-02-30", headers=api.headers("clinician"))
    assert bad.status_code == 422
    assert api.client.get("/notes/worklist", headers=api.headers("auditor")).status_code == 403


def test_a_draft_first_sent_whole_reaches_the_receiver_once(database_url: str) -> None:
    # Over real HTTP to the test receiver: versions kept as typed send nothing; the first
    # whole version is a conditional update, which creates what the receiver does not hold
    # (FHIR R4 3.1.0.4.3, conditional update: no match creates the resource).
    clock = Clock()
    service = sync_notes(database_url, clock, forward=True)
    who = Principal("dr test", "clinician")
    try:
        _c, kept = service.submit(json.dumps(bare_draft()).encode(), who)
        whole = whole_of(bare_draft())
        body = json.dumps({"note": whole}).encode()
        stored = service.amend(kept.key, body, who, 1)
        assert stored.version == 2
        receiver = Receiving()
        with running(receiver) as url:
            worker = worker_for(service, url, clock)
            drain(service, worker, clock, rounds=3)
            service.run(worker.aclose())
        entries = service.run(service.store.outbox(None, 10))
        assert [(e.version, e.state) for e in entries] == [(2, "delivered")]
        assert receiver.count("Procedure") == 1
    finally:
        service.close()
