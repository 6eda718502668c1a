"""The FHIR read API and $validate on both engines."""

from __future__ import annotations

import json
from typing import Any

import pytest

from tests.conftest import EXAMPLES, VALID, Api, routine
from tests.fhir_r4_check import r4_problems

MRN = "https://harbourside-eye.example/fhir/sid/mrn"


def load_demo(api: Api) -> dict[str, Any]:
    out = {}
    for path in VALID:
        r = api.client.post("/notes", content=path.read_text(), headers=api.headers("submitter"))
        assert r.status_code == 201
        out[path.stem] = r.json()
    return out


def fhir(api: Api, url: str, **params: Any) -> Any:
    r = api.client.get(url, params=params, headers=api.headers("analyst"))
    assert r.headers["content-type"].startswith("application/fhir+json"), r.text
    return r


def test_capability_statement_is_valid_r4_and_truthful(api: Api) -> None:
    r = api.client.get("/fhir/metadata")
    statement = r.json()
    assert r4_problems(statement) == []  # google-fhir-r4 and the core invariants (cpb-*)
    assert statement["fhirVersion"] == "4.0.1"
    resources = {res["type"]: res for res in statement["rest"][0]["resource"]}
    # $validate is claimed where it answers: on each searchable type, on Bundle and
    # system-wide (tests/test_fhir_search.py checks that every declared search parameter
    # is applied).
    assert [op["name"] for op in statement["rest"][0]["operation"]] == ["validate"]
    assert set(resources) == {
        "Procedure",
        "Observation",
        "ServiceRequest",
        "MedicationRequest",
        "MedicationAdministration",
        "Provenance",
        "AuditEvent",
        "StructureDefinition",
        "CodeSystem",
        "ValueSet",
        "Bundle",
    }
    validated = [kind for kind, res in resources.items() if "operation" in res]
    assert set(validated) == {
        "Procedure",
        "Observation",
        "ServiceRequest",
        "MedicationRequest",
        "MedicationAdministration",
        "Bundle",
    }
    for kind in [*validated, ""]:
        r = api.client.post(
            f"/fhir/{kind}/$validate" if kind else "/fhir/$validate",
            content=json.dumps({"resourceType": kind or "Patient"}),
            headers=api.headers("analyst"),
        )
        assert r.status_code == 200, (kind, r.text)
    # Every interaction claimed answers: a read of each type served without a note.
    h = api.headers("auditor")
    assert api.client.get("/fhir/AuditEvent", headers=h).status_code == 200
    for kind in ("StructureDefinition", "CodeSystem", "ValueSet"):
        assert api.client.get(f"/fhir/{kind}").status_code == 200


def test_read_every_stored_resource_and_its_history(api: Api) -> None:
    stored = load_demo(api)["right-routine"]
    # The answer says where each Bundle entry is read, in entry order.
    assert len(stored["resources"]) == len(stored["bundle"]["entry"])
    for entry, where in zip(stored["bundle"]["entry"], stored["resources"], strict=True):
        kind, rid = where.split("/")
        assert kind == entry["resource"]["resourceType"]
        r = fhir(api, f"/fhir/{where}")
        assert r.status_code == 200
        resource = r.json()
        assert resource["id"] == rid
        assert resource["meta"]["versionId"] == "1"
        # The same resource as emitted, with the same identifiers (Provenance has neither
        # identifier nor status in R4) ...
        assert resource.get("identifier") == entry["resource"].get("identifier")
        assert resource.get("status") == entry["resource"].get("status")
        assert r4_problems(resource) == []
        # ... and its references within the Bundle readable here (FHIR R4 3.2.0.4:
        # relative references resolve against the server's base).
        for ref in _references(resource):
            assert not ref.startswith("urn:uuid:")
            assert fhir(api, f"/fhir/{ref}").status_code == 200
    assert stored["resources"][0] == f"Procedure/{stored['id']}"
    proc_id = stored["id"]
    history = fhir(api, f"/fhir/Procedure/{proc_id}/_history").json()
    assert history["type"] == "history"
    assert history["total"] == 1
    assert r4_problems(history) == []


def _references(node: Any) -> list[str]:
    if isinstance(node, dict):
        found = [node["reference"]] if isinstance(node.get("reference"), str) else []
        return found + [r for value in node.values() for r in _references(value)]
    if isinstance(node, list):
        return [r for value in node for r in _references(value)]
    return []


@pytest.mark.parametrize(
    "resource_id",
    [
        "x",
        "00000000-0000-0000-0000-000000000000-",
        "00000000-0000-0000-0000-000000000000-A",
        "1" * 80,
    ],
)
def test_ids_that_cannot_name_a_resource_are_not_found(api: Api, resource_id: str) -> None:
    assert fhir(api, f"/fhir/Observation/{resource_id}").status_code == 404


def test_a_resource_read_as_another_type_is_not_found(api: Api) -> None:
    stored = load_demo(api)["right-routine"]
    observation = next(r for r in stored["resources"] if r.startswith("Observation/"))
    assert (
        fhir(api, observation.replace("Observation/", "/fhir/ServiceRequest/")).status_code == 404
    )


def test_amendment_raises_the_version_id_and_keeps_history(api: Api) -> None:
    key = load_demo(api)["right-routine"]["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    r = api.client.put(
        f"/notes/{key}",
        content=json.dumps({"reason": "re-measured", "note": changed}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    assert r.status_code == 200
    current = fhir(api, f"/fhir/Procedure/{key}").json()
    assert current["meta"]["versionId"] == "2"
    history = fhir(api, f"/fhir/Procedure/{key}/_history").json()
    assert [e["resource"]["meta"]["versionId"] for e in history["entry"]] == ["2", "1"]
    assert fhir(api, f"/fhir/Procedure/{key}/_history/1").json()["meta"]["versionId"] == "1"
    assert fhir(api, f"/fhir/Procedure/{key}/_history/9").status_code == 404


def test_search_procedures_by_patient_and_date(api: Api) -> None:
    load_demo(api)
    by_patient = fhir(api, "/fhir/Procedure", **{"patient:identifier": f"{MRN}|HX100234"}).json()
    assert by_patient["total"] == 1
    assert r4_problems(by_patient) == []
    # demo sessions: 26, 27 (two), 30 Nov and 1 Dec 2026
    assert fhir(api, "/fhir/Procedure", date="2026-11-27").json()["total"] == 2
    ranged = api.client.get(
        "/fhir/Procedure?date=ge2026-11-27&date=lt2026-12-01", headers=api.headers("analyst")
    ).json()
    assert ranged["total"] == 3
    assert fhir(api, "/fhir/Procedure", date="2026-02-30").status_code == 400


def test_what_is_due(api: Api) -> None:
    load_demo(api)
    due = fhir(api, "/fhir/ServiceRequest", status="active", occurrence="le2026-12-10").json()
    targets = sorted(e["resource"]["occurrenceTiming"]["event"][0][:10] for e in due["entry"])
    assert targets
    assert all(t <= "2026-12-10" for t in targets)
    assert all(e["resource"]["status"] == "active" for e in due["entry"])
    later = fhir(api, "/fhir/ServiceRequest", status="active", occurrence="gt2026-12-10").json()
    assert "2026-12-29" in [e["resource"]["occurrenceTiming"]["event"][0] for e in later["entry"]]


def test_paging_links(api: Api) -> None:
    load_demo(api)
    first = fhir(api, "/fhir/ServiceRequest", _count=2).json()
    assert len(first["entry"]) == 2
    assert first["total"] > 2
    assert any(link["relation"] == "next" for link in first["link"])


@pytest.mark.parametrize(
    ("body", "severity"),
    [
        (
            {
                "resourceType": "Procedure",
                "status": "completed",
                "subject": {"reference": "Patient/1"},
            },
            "information",
        ),
        (
            {"resourceType": "Procedure", "status": "done", "subject": {"reference": "Patient/1"}},
            "error",
        ),
        ({"resourceType": "Procedure", "status": "completed"}, "error"),  # subject 1..1
    ],
)
def test_validate_a_resource(api: Api, body: dict[str, Any], severity: str) -> None:
    r = api.client.post(
        "/fhir/Procedure/$validate", content=json.dumps(body), headers=api.headers("analyst")
    )
    assert r.status_code == 200
    outcome = r.json()
    assert r4_problems(outcome) == []
    assert outcome["issue"][0]["severity"] == severity
    if severity == "error":
        assert outcome["issue"][0]["expression"][0].startswith("Procedure")


def test_validate_a_bundle_finds_the_entry(api: Api) -> None:
    bundle = json.loads((EXAMPLES / "bundles" / "right-routine.bundle.json").read_text())
    ok = api.client.post(
        "/fhir/Bundle/$validate", content=json.dumps(bundle), headers=api.headers("analyst")
    )
    assert ok.json()["issue"][0]["severity"] == "information"
    bundle["entry"][3]["resource"]["status"] = "done"
    bad = api.client.post(
        "/fhir/Bundle/$validate", content=json.dumps(bundle), headers=api.headers("analyst")
    )
    assert "Bundle.entry[3].resource.status" in bad.json()["issue"][0]["expression"]


def test_validate_type_mismatch(api: Api) -> None:
    body = json.dumps({"resourceType": "Observation", "status": "final", "code": {"text": "x"}})
    r = api.client.post("/fhir/Procedure/$validate", content=body, headers=api.headers("analyst"))
    assert r.json()["issue"][0]["details"]["coding"][0]["code"] == "fhir-type-mismatch"


def test_unknown_resource_type_and_id(api: Api) -> None:
    assert fhir(api, "/fhir/Patient/123").status_code == 404
    assert fhir(api, "/fhir/Procedure/no-such-id").status_code == 404


@pytest.mark.parametrize("kind", ["Foo", "Coding", "DomainResource"])
def test_validate_an_unknown_or_non_resource_type_is_404(api: Api, kind: str) -> None:
    # FHIR R4 http.html: an unknown resource type is 404; the answer names it.
    r = api.client.post(
        f"/fhir/{kind}/$validate",
        content=json.dumps({"resourceType": kind}),
        headers=api.headers("analyst"),
    )
    assert r.status_code == 404
    assert f"'{kind}'" in r.json()["issue"][0]["diagnostics"]
