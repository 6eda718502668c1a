"""References a hospital record can link (issue 15, section 3): each reference mode of the
site policy, sent to a real receiving FHIR server (tests/fhir_receiver.py) over HTTP.

FHIR R4 http.html, transaction, "Conditional References": a reference such as
``Patient?identifier=system|value`` is resolved by the receiver inside the transaction;
"If there are no matches, or multiple matches, the transaction fails"."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import httpx
import pytest

from capnote.assess import Assessor
from capnote.config import Settings, effective_policy
from capnote.errors import PolicyError
from capnote.fhir import profiles
from capnote.fhir.profile_check import check_profile
from capnote.fhir.validate import validate_resource
from capnote.notes import NoteService, Principal
from capnote.policy import load_policy
from capnote.store.database import migrate, open_store
from tests.conftest import NOW, SyncNotes, routine
from tests.fhir_r4_check import r4_problems
from tests.fhir_receiver import FHIR, Store, running
from tests.test_delivery import Clock, drain, worker_for

AUTH = {"Authorization": "Bearer receiver-secret", "Content-Type": FHIR}


@pytest.fixture(scope="module")
def receiver() -> Iterator[tuple[Store, str]]:
    store = Store()
    with running(store) as url:
        yield store, url


def conditional_assessor() -> Assessor:
    policy = load_policy()
    record = policy.record.model_copy(update={"references": "conditional"})
    return Assessor(policy.model_copy(update={"record": record}))


def emitted(mode: str, base: str | None = None, data: dict[str, Any] | None = None) -> Any:
    policy = load_policy()
    record = policy.record.model_copy(update={"references": mode, "reference_base": base})
    assessor = Assessor(policy.model_copy(update={"record": record}))
    result = assessor.assess(json.dumps(data or routine()), NOW)
    assert result.bundle is not None, result.findings
    return result.bundle


def conforms(bundle: dict[str, Any]) -> None:
    """google-fhir-r4, capnote's validator and capnote's published profiles all accept it."""
    assert r4_problems(bundle) == []
    assert [f.message for f in validate_resource(bundle) if f.blocking] == []
    for entry in bundle["entry"]:
        resource = entry["resource"]
        url = profiles.profile_for(resource)
        assert url is not None
        sd = profiles.profile(url)
        assert sd is not None
        assert check_profile(resource, sd) == [], url


def chart(store: Store, data: dict[str, Any], literal: bool = False) -> str:
    """The hospital's own Patient, Encounter and Practitioner for the note; the Patient id.
    literal: the record's ids are the site's numbers."""

    def held(kind: str, ident: dict[str, str]) -> str:
        rid = ident["value"] if literal else None
        return store.put({"resourceType": kind, "identifier": [ident]}, rid)

    held("Encounter", data["encounter"])
    held("Practitioner", data["performer"]["identifier"])
    return held("Patient", data["patient"])


def send(url: str, bundle: dict[str, Any]) -> httpx.Response:
    return httpx.post(url, content=json.dumps(bundle), headers=AUTH, timeout=20)


def found_for(url: str, patient_id: str) -> list[dict[str, Any]]:
    answer = httpx.get(f"{url}/Procedure", params={"patient": f"Patient/{patient_id}"})
    assert answer.status_code == 200
    return [e["resource"] for e in answer.json()["entry"]]


def other_patient(value: str) -> dict[str, Any]:
    data = routine()
    data["patient"] = {**data["patient"], "value": value}
    data["note_id"] = {**data["note_id"], "value": f"{data['note_id']['value']}-{value}"}
    # One receiver serves the module: each test's chart holds its own visit and clinician.
    data["encounter"] = {**data["encounter"], "value": f"V-{value}"}
    staff = data["performer"]["identifier"]
    data["performer"]["identifier"] = {**staff, "value": f"S-{value}"}
    return data


def test_identifier_only_leaves_the_chart_unlinked(receiver: tuple[Store, str]) -> None:
    # Today's default: accepted, but the receiver's patient= search misses the Procedure.
    store, url = receiver
    data = other_patient("ID-ONLY-1")
    patient_id = chart(store, data)
    bundle = emitted("identifier", data=data)
    proc = bundle["entry"][0]["resource"]
    assert proc["subject"] == {"identifier": data["patient"]}
    assert send(url, bundle).status_code == 200
    assert found_for(url, patient_id) == []


def test_conditional_references_are_resolved_by_the_receiver(receiver: tuple[Store, str]) -> None:
    store, url = receiver
    data = other_patient("COND-1")
    patient_id = chart(store, data)
    bundle = emitted("conditional", data=data)
    conforms(bundle)
    subject = bundle["entry"][0]["resource"]["subject"]
    assert subject["reference"].startswith("Patient?identifier=")
    assert subject["identifier"] == data["patient"]  # kept for a receiver that resolves none
    answer = send(url, bundle)
    assert answer.status_code == 200, answer.text
    [proc] = found_for(url, patient_id)
    assert proc["identifier"] == bundle["entry"][0]["resource"]["identifier"]
    assert proc["performer"][0]["actor"]["reference"].startswith("Practitioner/")
    assert proc["encounter"]["reference"].startswith("Encounter/")
    # Every Observation of the note is linked to the chart too.
    observations = store.linked("Observation", f"Patient/{patient_id}")
    sent = [e for e in bundle["entry"] if e["resource"]["resourceType"] == "Observation"]
    assert len(observations) == len(sent) > 0


def test_a_conditional_reference_matching_no_patient_fails_the_transaction(
    receiver: tuple[Store, str],
) -> None:
    store, url = receiver
    data = other_patient("COND-NONE")
    before = (store.count("Procedure"), store.count("Observation"))
    answer = send(url, emitted("conditional", data=data))  # no Patient holds COND-NONE
    assert answer.status_code == 404
    assert "no resource" in answer.json()["issue"][0]["diagnostics"]
    assert (store.count("Procedure"), store.count("Observation")) == before  # all or nothing


def test_a_conditional_reference_matching_two_patients_fails_the_transaction(
    receiver: tuple[Store, str],
) -> None:
    store, url = receiver
    data = other_patient("COND-TWICE")
    chart(store, data)
    store.put({"resourceType": "Patient", "identifier": [data["patient"]]})
    before = (store.count("Procedure"), store.count("Observation"))
    answer = send(url, emitted("conditional", data=data))
    assert answer.status_code == 412
    assert "several resources" in answer.json()["issue"][0]["diagnostics"]
    assert (store.count("Procedure"), store.count("Observation")) == before


def test_literal_references_under_the_configured_base(receiver: tuple[Store, str]) -> None:
    store, url = receiver
    data = other_patient("LIT-1")
    patient_id = chart(store, data, literal=True)
    bundle = emitted("literal", base=url, data=data)
    conforms(bundle)
    proc = bundle["entry"][0]["resource"]
    assert proc["subject"]["reference"] == f"{url}/Patient/LIT-1"
    answer = send(url, bundle)
    assert answer.status_code == 200, answer.text
    assert len(found_for(url, patient_id)) == 1


def test_a_literal_reference_to_a_patient_the_receiver_lacks_fails(
    receiver: tuple[Store, str],
) -> None:
    store, url = receiver
    before = store.count("Procedure")
    answer = send(url, emitted("literal", base=url, data=other_patient("LIT-ABSENT")))
    assert answer.status_code == 404
    assert store.count("Procedure") == before


def test_a_number_that_is_not_a_fhir_id_stays_identifier_only() -> None:
    # R4 datatypes, id: [A-Za-z0-9\-\.]{1,64}; a number with "_" cannot name a resource.
    bundle = emitted("literal", base="https://ehr.example/fhir", data=other_patient("A_1"))
    assert "reference" not in bundle["entry"][0]["resource"]["subject"]


def test_literal_mode_needs_a_base(tmp_path: Any) -> None:
    site = tmp_path / "site.toml"
    site.write_text('[record]\nreferences = "literal"\n')
    with pytest.raises(PolicyError, match="reference_base"):
        load_policy(site)
    site.write_text('[record]\nreferences = "literal"\nreference_base = "ehr.example"\n')
    with pytest.raises(PolicyError, match="http"):
        load_policy(site)


def test_settings_choose_the_mode_over_the_policy() -> None:
    chosen = effective_policy(
        Settings(fhir_references="literal", fhir_reference_base="https://ehr.example/fhir")
    )
    assert chosen.record.references == "literal"
    assert chosen.record.reference_base == "https://ehr.example/fhir"
    assert chosen.record.region == "england"  # the policy's, untouched
    with pytest.raises(PolicyError, match="reference_base"):
        effective_policy(Settings(fhir_references="literal"))


def test_capnote_forwards_conditional_references_and_parks_an_unknown_patient(
    receiver: tuple[Store, str], tmp_path: Any
) -> None:
    # End to end: notes stored by capnote (a real SQLite file), forwarded by its delivery
    # worker over HTTP. The patient the hospital holds is linked; the one it does not is
    # refused whole by the receiver and parked with the receiver's OperationOutcome.
    store, url = receiver
    database = f"sqlite:///{tmp_path / 'capnote.sqlite3'}"
    migrate(database)
    clock = Clock()
    service = SyncNotes(
        NoteService(open_store(database), conditional_assessor(), clock, forward=True)
    )
    try:
        known, unknown = other_patient("FWD-KNOWN"), other_patient("FWD-UNKNOWN")
        patient_id = chart(store, known)
        for data in (known, unknown):
            service.submit(json.dumps(data).encode(), Principal("forward test", "submitter"))
        worker = worker_for(service, url, clock)
        drain(service, worker, clock, rounds=3)
        service.run(worker.aclose())
        by_state = {e.state: e for e in service.run(service.store.outbox(None, 10))}
    finally:
        service.close()
    assert set(by_state) == {"delivered", "failed"}
    assert by_state["failed"].last_status == 404
    assert "no resource" in (by_state["failed"].last_error or "")
    assert len(found_for(url, patient_id)) == 1
