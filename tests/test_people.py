"""People, not token labels (issue 14, §3): a token belongs to a named person or system
client, every version records the token that stored it, a signed version records who signed
it and when, and each version's Bundle carries an R4 Provenance saying so."""

from __future__ import annotations

import json
from datetime import timedelta
from typing import Any

from capnote.store.base import Store
from tests.conftest import EXAMPLES, NOW, Api, new_token, on_store, routine
from tests.fhir_r4_check import r4_problems

STAFF = ("https://harbourside-eye.example/fhir/sid/staff", "S-0777")
ROUTINE = (EXAMPLES / "notes" / "right-routine.json").read_text()


def _bearer(token: str, **extra: str) -> dict[str, str]:
    return {"authorization": f"Bearer {token}", "content-type": "application/json", **extra}


def _provenance(bundle: dict[str, Any]) -> dict[str, Any]:
    [found] = [e for e in bundle["entry"] if e["resource"]["resourceType"] == "Provenance"]
    assert found["request"] == {"method": "PUT", "url": f"Provenance/{found['resource']['id']}"}
    resource: dict[str, Any] = found["resource"]
    return resource


def _agents(provenance: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {a["type"]["coding"][0]["code"]: a["who"] for a in provenance["agent"]}


def test_a_clinician_signs_as_the_person_the_token_belongs_to(api: Api) -> None:
    token, token_id = new_token(api.url, "clinician", "Dr Ada Quill", staff=STAFF)
    draft = routine()
    draft["status"] = "draft"
    r = api.client.post("/notes", content=json.dumps(draft), headers=_bearer(token))
    assert r.status_code == 201
    assert r.json()["signed"] is None  # a draft is signed by nobody
    key = r.json()["id"]
    signed = api.client.put(
        f"/notes/{key}",
        content=json.dumps({"note": routine()}),
        headers=_bearer(token, **{"if-match": 'W/"1"'}),
    )
    assert signed.status_code == 200
    body = signed.json()
    assert body["signed"] == {
        "by": "Dr Ada Quill",
        "staff_identifier": {"system": STAFF[0], "value": STAFF[1]},
        "at": NOW.isoformat(),
    }
    provenance = _provenance(body["bundle"])
    assert provenance["activity"]["coding"][0]["code"] == "UPDATE"
    assert provenance["recorded"] == NOW.isoformat()
    agents = _agents(provenance)
    person = {
        "type": "Practitioner",
        "identifier": {"system": STAFF[0], "value": STAFF[1]},
        "display": "Dr Ada Quill",
    }
    assert agents == {"author": person, "attester": person}
    # Every other resource of the version is a target.
    others = [e["fullUrl"] for e in body["bundle"]["entry"] if e["resource"] is not provenance]
    assert sorted(t["reference"] for t in provenance["target"]) == sorted(others)
    assert r4_problems(body["bundle"]) == []
    versions = api.client.get(f"/notes/{key}/versions", headers=api.headers("auditor")).json()
    assert [(v["recorded_by"], v["recorded_by_token"]) for v in versions["versions"]] == [
        ("Dr Ada Quill", token_id),
        ("Dr Ada Quill", token_id),
    ]
    assert versions["versions"][0]["signed"] is None
    assert versions["versions"][1]["signed"]["by"] == "Dr Ada Quill"


def test_a_system_client_sends_what_the_performer_signed(api: Api) -> None:
    token, token_id = new_token(api.url, "submitter", "EHR interface")
    r = api.client.post("/notes", content=ROUTINE, headers=_bearer(token))
    assert r.status_code == 201
    performer = routine()["performer"]
    assert r.json()["signed"]["by"] == performer["name"]
    # The EHR sent no signing time: none is written down as if it were one.
    assert r.json()["signed"]["at"] is None
    agents = _agents(_provenance(r.json()["bundle"]))
    assert agents["author"] == {
        "type": "Device",
        "display": "EHR interface",
        "identifier": {"system": "https://capnote.org/fhir/sid/token", "value": str(token_id)},
    }
    assert agents["attester"]["identifier"] == performer["identifier"]
    assert _provenance(r.json()["bundle"])["activity"]["coding"][0]["code"] == "CREATE"


def test_two_tokens_with_one_label_are_told_apart(api: Api) -> None:
    first, first_id = new_token(api.url, "submitter", "x")
    second, second_id = new_token(api.url, "submitter", "x")
    key = api.client.post("/notes", content=ROUTINE, headers=_bearer(first)).json()["id"]
    api.client.post(
        f"/notes/{key}/void",
        content=json.dumps({"reason": "duplicate"}),
        headers=_bearer(second, **{"if-match": 'W/"1"'}),
    )
    entries = api.client.get("/audit", params={"note": key}, headers=api.headers("auditor"))
    assert [(e["actor"], e["token_id"]) for e in entries.json()["entries"]] == [
        ("x", second_id),
        ("x", first_id),
    ]


def test_an_expired_token_is_refused_and_use_is_recorded(api: Api) -> None:
    old, _ = new_token(api.url, "analyst", "contractor", expires_at=NOW - timedelta(seconds=1))
    live, live_id = new_token(api.url, "analyst", "analyst", expires_at=NOW + timedelta(days=1))
    refused = api.client.get("/notes/x", headers=_bearer(old))
    assert refused.status_code == 401
    assert "expired" in refused.json()["issue"][0]["diagnostics"]
    assert api.client.get("/fhir/metadata", headers=_bearer(live)).status_code == 200
    api.client.get("/notes", params={"patient": "a|b"}, headers=_bearer(live))

    async def listed(store: Store) -> Any:
        return await store.tokens()

    [info] = [t for t in on_store(api.url, listed) if t.id == live_id]
    assert info.last_used_at == NOW
    assert info.expires_at == NOW + timedelta(days=1)


def test_each_version_s_provenance_stays_readable(api: Api) -> None:
    key = api.client.post("/notes", content=ROUTINE, headers=api.headers("submitter")).json()["id"]
    changed = routine()
    changed["result"]["opening"]["horizontal_mm"] = 4.0
    api.client.put(
        f"/notes/{key}",
        content=json.dumps({"reason": "re-measured", "note": changed}),
        headers=api.headers("clinician", **{"if-match": 'W/"1"'}),
    )
    h = api.headers("auditor")
    first = api.client.get(f"/fhir/Provenance/{key}-provenance-1", headers=h)
    second = api.client.get(f"/fhir/Provenance/{key}-provenance-2", headers=h)
    assert (first.status_code, second.status_code) == (200, 200)
    assert first.json()["activity"]["coding"][0]["code"] == "CREATE"
    assert second.json()["activity"]["coding"][0]["code"] == "UPDATE"
    assert second.json()["reason"] == [{"text": "re-measured"}]
    # Its targets are served as references you can follow on this API.
    target = second.json()["target"][0]["reference"]
    assert api.client.get(f"/fhir/{target}", headers=h).status_code == 200
    assert r4_problems(second.json()) == []
    assert api.client.get(f"/fhir/Provenance/{key}-provenance-3", headers=h).status_code == 404
