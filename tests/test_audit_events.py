"""The audit trail is complete and standard (issue 14, §7): every read and search of patient
data, every refused request with its outcome, every token made or revoked and every delivery
is recorded, and auditors read the trail as R4 AuditEvent resources, searchable by date,
agent, entity and outcome."""

from __future__ import annotations

import base64
import json
from typing import Any

from capnote.store.base import AuditRow, Store
from tests.conftest import EXAMPLES, NOW, Api, new_token, on_store, routine
from tests.fhir_r4_check import r4_problems

ROUTINE = (EXAMPLES / "notes" / "right-routine.json").read_text()


def _events(api: Api, **params: str) -> dict[str, Any]:
    r = api.client.get("/fhir/AuditEvent", params=params, headers=api.headers("auditor"))
    assert r.status_code == 200, r.text
    bundle: dict[str, Any] = r.json()
    return bundle


def _what(bundle: dict[str, Any]) -> list[tuple[str, str, str]]:
    """(subtype or type code, action, outcome) per AuditEvent, newest first."""
    out = []
    for e in bundle["entry"]:
        r = e["resource"]
        code = r["subtype"][0]["code"] if "subtype" in r else r["type"]["code"]
        out.append((code, r["action"], r["outcome"]))
    return out


def test_reads_searches_and_refusals_are_recorded(api: Api) -> None:
    created = api.client.post("/notes", content=ROUTINE, headers=api.headers("submitter"))
    key = created.json()["id"]
    h = api.headers("clinician")
    api.client.get(f"/notes/{key}", headers=h)
    api.client.get(f"/fhir/Procedure/{key}", headers=h)
    system = routine()["patient"]["system"]
    api.client.get(
        "/fhir/Procedure", params={"patient:identifier": f"{system}|HX100234"}, headers=h
    )
    api.client.get(f"/notes/{key}", headers={"authorization": "Bearer nobody"})  # 401
    api.client.get(f"/notes/{key}", headers=api.headers("analyst"))  # 200: analysts read
    conflict = routine()
    conflict["result"]["opening"]["horizontal_mm"] = 4.0
    api.client.post("/notes", content=json.dumps(conflict), headers=api.headers("submitter"))  # 409
    api.client.get("/fhir/metadata")  # no patient data: not recorded
    api.client.post("/notes/check", content=ROUTINE, headers=api.headers("analyst"))  # nothing read

    bundle = _events(api)
    assert r4_problems(bundle) == []
    assert _what(bundle)[:7] == [
        ("create", "C", "4"),  # the 409
        ("read", "R", "0"),
        ("read", "R", "4"),  # the 401
        ("search-type", "R", "0"),
        ("read", "R", "0"),
        ("read", "R", "0"),
        ("create", "C", "0"),  # stored: recorded with its version
    ]
    refused = bundle["entry"][2]["resource"]
    assert refused["outcomeDesc"] == "401"
    assert refused["agent"][0]["who"] == {"display": "(no valid token)"}
    search = bundle["entry"][3]["resource"]
    [request] = [e for e in search["entity"] if "query" in e]
    assert base64.b64decode(request["query"]).decode().startswith("patient%3Aidentifier=")
    read = bundle["entry"][4]["resource"]
    assert read["entity"][0]["what"] == {"reference": f"Procedure/{key}"}
    assert read["agent"][0]["who"]["display"] == "test clinician"
    # Identifiers may appear; no other patient values (the note's name, birth date, values).
    text = json.dumps(bundle)
    assert routine()["performer"]["name"] not in text
    assert "opening" not in text


def test_the_trail_is_searchable_by_agent_entity_outcome_and_date(api: Api) -> None:
    token, token_id = new_token(api.url, "analyst", "Records Office")
    key = api.client.post("/notes", content=ROUTINE, headers=api.headers("submitter")).json()["id"]
    auth = {"authorization": f"Bearer {token}"}
    api.client.get(f"/notes/{key}", headers=auth)
    api.client.get("/notes/00000000-0000-0000-0000-000000000000", headers=auth)  # 404
    mine = _events(api, agent=str(token_id))
    assert mine["total"] == 2
    assert {e["resource"]["agent"][0]["who"]["identifier"]["value"] for e in mine["entry"]} == {
        str(token_id)
    }
    assert _events(api, **{"agent-name": "records"})["total"] == 2  # starts with, any case
    assert _events(api, entity=f"Procedure/{key}")["total"] == 2  # its creation and one read
    assert [e["resource"]["outcomeDesc"] for e in _events(api, outcome="4")["entry"]] == ["404"]
    day = NOW.date().isoformat()
    # Every entry so far is of today (the test clock), the auditor's own searches included.
    everything = _events(api)["total"]
    assert everything >= 3
    assert _events(api, date=day)["total"] == everything + 1  # and that search itself
    assert _events(api, date=f"gt{day}")["total"] == 0
    one = api.client.get(
        f"/fhir/AuditEvent/{mine['entry'][0]['resource']['id']}", headers=api.headers("auditor")
    )
    assert one.status_code == 200
    assert r4_problems(one.json()) == []


def test_an_unsupported_parameter_is_refused_not_ignored(api: Api) -> None:
    r = api.client.get("/fhir/AuditEvent", params={"patient": "x"}, headers=api.headers("auditor"))
    assert r.status_code == 400
    diagnostics = r.json()["issue"][0]["diagnostics"]
    assert "'patient'" in diagnostics
    assert "agent-name" in diagnostics  # the supported ones are listed
    assert api.client.get("/fhir/AuditEvent", headers=api.headers("clinician")).status_code == 403


def test_tokens_and_deliveries_are_in_the_trail(api: Api) -> None:
    async def recorded(store: Store) -> None:
        await store.record(
            AuditRow(NOW, "capnote (delivery)", "system", "deliver", None, None, "x", "retry-503"),
            "00000000-0000-5000-8000-000000000000",
            1,
        )

    on_store(api.url, recorded)
    [event] = _events(api, outcome="8")["entry"]
    assert (event["resource"]["type"]["code"], event["resource"]["action"]) == ("110106", "E")
