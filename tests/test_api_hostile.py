"""Hostile and odd requests: each gets a quick 4xx OperationOutcome and the service keeps
serving. Every route in the OpenAPI document is walked with each kind of credential."""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.conftest import EXAMPLES, NOW, VALID, Api, new_token, revoke_token, routine

ROUTINE = (EXAMPLES / "notes" / "right-routine.json").read_text()

# Who may call what (from the role table in issue 3); every other role gets 403.
WRITE = {"submitter", "clinician"}
CHECK = {"submitter", "clinician", "analyst"}
READ = {"submitter", "clinician", "analyst", "auditor"}
OPEN: set[str] = set()  # no token needed
ALLOWED: dict[tuple[str, str], set[str] | None] = {
    ("get", "/healthz"): None,
    ("get", "/readyz"): None,
    ("get", "/fhir/metadata"): None,
    ("post", "/notes"): WRITE,
    ("post", "/notes/check"): CHECK,
    ("get", "/notes"): READ,
    # The form's worklist names the asking token's drafts: for those who write notes.
    ("get", "/notes/worklist"): WRITE,
    ("get", "/notes/{note_id}"): READ,
    ("get", "/notes/{note_id}/versions"): READ,
    ("get", "/notes/{note_id}/delivery"): READ,
    ("get", "/notes/{note_id}/versions/{version}"): READ,
    ("put", "/notes/{note_id}"): WRITE,
    ("post", "/notes/{note_id}/void"): WRITE,
    ("get", "/notes/{note_id}/reviews"): READ,
    ("post", "/reviews"): WRITE,
    ("post", "/reviews/check"): CHECK,
    ("get", "/reviews/{review_id}"): READ,
    ("get", "/reviews/{review_id}/versions"): READ,
    ("get", "/reviews/{review_id}/delivery"): READ,
    ("get", "/reviews/{review_id}/versions/{version}"): READ,
    ("put", "/reviews/{review_id}"): WRITE,
    ("post", "/reviews/{review_id}/void"): WRITE,
    ("get", "/fhir/{kind}"): READ,
    ("post", "/fhir/{kind}/_search"): READ,
    ("get", "/fhir/{kind}/{resource_id}"): READ,
    ("get", "/fhir/{kind}/{resource_id}/_history"): READ,
    ("get", "/fhir/{kind}/{resource_id}/_history/{version}"): READ,
    ("post", "/fhir/{kind}/$validate"): CHECK,
    ("post", "/fhir/$validate"): CHECK,
    ("get", "/fhir/StructureDefinition"): None,
    ("get", "/fhir/CodeSystem"): None,
    ("get", "/fhir/ValueSet"): None,
    ("get", "/fhir/StructureDefinition/{resource_id}"): None,
    ("get", "/fhir/CodeSystem/{resource_id}"): None,
    ("get", "/fhir/ValueSet/{resource_id}"): None,
    ("get", "/audit"): {"auditor"},
    ("get", "/audit/clinical"): {"auditor"},
    ("get", "/fhir/AuditEvent"): {"auditor"},
    ("get", "/fhir/AuditEvent/{event_id}"): {"auditor"},
}
FILL = {
    "{note_id}": "00000000-0000-0000-0000-000000000000",
    "{review_id}": "00000000-0000-0000-0000-000000000000",
    "{version}": "1",
    "{kind}": "Procedure",
    "{resource_id}": "x",
    "{event_id}": "1",
}


def routes(api: Api) -> list[tuple[str, str]]:
    spec = api.client.get("/openapi.json").json()
    return [(m, p) for p, ops in spec["paths"].items() for m in ops]


def test_every_documented_route_is_in_the_role_table(api: Api) -> None:
    documented = set(routes(api))
    assert documented == set(ALLOWED), documented ^ set(ALLOWED)


# The package's resources answer without a token: ids that exist, so the walk sees a 200.
PACKAGE_IDS = {
    "/fhir/StructureDefinition/{resource_id}": "capnote-procedure",
    "/fhir/CodeSystem/{resource_id}": "capnote",
    "/fhir/ValueSet/{resource_id}": "capnote-all",
}


def call(api: Api, method: str, path: str, token: str | None) -> Any:
    url = path.replace("{resource_id}", PACKAGE_IDS[path]) if path in PACKAGE_IDS else path
    for key, value in FILL.items():
        url = url.replace(key, value)
    headers = {"content-type": "application/json"}
    if token is not None:
        headers["authorization"] = f"Bearer {token}"
    body = {"post": ROUTINE, "put": json.dumps({"reason": "r", "note": routine()})}.get(method)
    params = {"patient": "urn:x|1"} if path == "/notes" and method == "get" else None
    return api.client.request(method.upper(), url, content=body, headers=headers, params=params)


def test_only_the_allowed_roles_get_through(api: Api) -> None:
    revoked, token_id = new_token(api.url, "submitter", "old")
    assert revoke_token(api.url, token_id)
    for (method, path), allowed in ALLOWED.items():
        if allowed is None:
            assert call(api, method, path, None).status_code < 400, (method, path)
            continue
        for token in (None, "cap_wrong", revoked):
            r = call(api, method, path, token)
            assert r.status_code == 401, (method, path, token)
            assert r.json()["resourceType"] == "OperationOutcome"
        for role, secret in api.tokens.items():
            r = call(api, method, path, secret)
            if role in allowed:
                assert r.status_code not in (401, 403), (method, path, role, r.text)
            else:
                assert r.status_code == 403, (method, path, role)
            assert r.status_code < 500, (method, path, role, r.text)


HOSTILE: list[tuple[str, bytes | str, dict[str, str], set[int]]] = [
    ("deep nesting", b"[" * 50_000 + b"]" * 50_000, {}, {422}),
    ("huge number", ROUTINE.replace('"value_mmhg": 15', '"value_mmhg": 1' + "0" * 400), {}, {422}),
    ("huge integer", ROUTINE.replace('"pulses": 18', '"pulses": ' + "9" * 5000), {}, {422}),
    ("very long string", ROUTINE.replace("Dr Ilona Marsh", "x" * 100_000), {}, {422}),
    ("NaN", ROUTINE.replace('"value_mmhg": 15', '"value_mmhg": NaN'), {}, {422}),
    ("Infinity", ROUTINE.replace('"value_mmhg": 15', '"value_mmhg": Infinity'), {}, {422}),
    ("invalid UTF-8", ROUTINE.encode().replace(b"Ilona", b"Il\xff\xfena"), {}, {422}),
    (
        "duplicate keys",
        ROUTINE.replace('"eye": "right",', '"eye": "right", "eye": "left",'),
        {},
        {422},
    ),
    ("form encoded", "a=1", {"content-type": "application/x-www-form-urlencoded"}, {415}),
    ("no content type", ROUTINE, {"content-type": ""}, {415}),
    ("empty body", b"", {}, {422}),
    ("over the size limit", b" " * 1_100_000, {}, {413}),
    ("a lie about length", ROUTINE, {"content-length": "abc"}, {413, 400}),
]


@pytest.mark.parametrize(
    ("case", "body", "headers", "statuses"), HOSTILE, ids=[h[0] for h in HOSTILE]
)
def test_hostile_bodies(
    api: Api, case: str, body: bytes | str, headers: dict[str, str], statuses: set[int]
) -> None:
    r = api.client.post("/notes", content=body, headers={**api.headers("submitter"), **headers})
    assert r.status_code in statuses, r.text[:300]
    if r.status_code != 400:  # a malformed header may be refused by the server itself
        assert r.json()["resourceType"] == "OperationOutcome"
    assert api.client.get("/healthz").status_code == 200  # still serving


@pytest.mark.parametrize(
    "value",
    [
        "' OR 1=1 --",
        "1; DROP TABLE note_version",
        "..%2F..%2Fetc%2Fpasswd",
        "%00",
        "<script>",
        "\U0001d54f" * 50,  # a non-BMP character, many bytes in UTF-8
    ],
)
def test_metacharacters_in_paths_and_queries(api: Api, value: str) -> None:
    h = api.headers("auditor")
    for url in (
        f"/notes/{value}",
        f"/notes/{value}/versions",
        f"/fhir/Procedure/{value}",
        f"/fhir/{value}/x",
    ):
        assert api.client.get(url, headers=h).status_code in (404, 422), url
    for params in ({"patient": f"{value}|{value}"}, {"patient": value}):
        assert api.client.get("/notes", params=params, headers=h).status_code in (200, 422)
    r = api.client.get(
        "/fhir/Procedure", params={"patient:identifier": f"a|{value}", "date": value}, headers=h
    )
    assert r.status_code == 400  # FHIR R4 search: a search the server cannot run
    assert r.json()["resourceType"] == "OperationOutcome"
    r = api.client.get("/audit", params={"note": value[:36]}, headers=h)
    assert r.status_code == 200
    assert r.json()["entries"] == []


def test_no_patient_data_in_logs(api: Api, caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.DEBUG)
    identifiers = set()
    for path in VALID:
        note = json.loads(path.read_text())
        identifiers.add(note["patient"]["value"])
        if "encounter" in note:
            identifiers.add(note["encounter"]["value"])
        assert (
            api.client.post(
                "/notes", content=path.read_text(), headers=api.headers("submitter")
            ).status_code
            == 201
        )
    # and the failure paths
    bad = routine()
    bad["patient"]["value"] = 42
    api.client.post("/notes", content=json.dumps(bad), headers=api.headers("submitter"))
    api.client.post(
        "/notes",
        content="{broken " + routine()["patient"]["value"],
        headers=api.headers("submitter"),
    )
    text = caplog.text
    assert caplog.records  # the service did log something
    for value in identifiers:
        assert value not in text


def test_unexpected_errors_answer_500_with_only_an_incident_id(
    api: Api, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    service = api.client.app.state.notes  # type: ignore[attr-defined]

    def broken(*_args: object) -> None:
        raise RuntimeError("HX100234 secret detail")

    monkeypatch.setattr(service, "get", broken)
    # As a real server would: the exception is answered, not raised into the test.
    client = TestClient(api.client.app, raise_server_exceptions=False)
    with caplog.at_level(logging.ERROR):
        r = client.get("/notes/abc", headers=api.headers("auditor"))
    assert r.status_code == 500
    outcome = r.json()
    assert outcome["resourceType"] == "OperationOutcome"
    assert "incident" in outcome["issue"][0]["diagnostics"]
    assert "secret" not in r.text
    assert "HX100234" not in caplog.text


def test_database_down_answers_503_with_retry_after(api: Api) -> None:
    from capnote.access import Access
    from capnote.api import deps
    from capnote.notes import NoteService
    from capnote.store.database import open_store

    app = api.client.app  # type: ignore[attr-defined]
    dead_store = open_store("postgresql+psycopg://nobody@127.0.0.1:1/none")
    live: NoteService = app.state.notes
    dead = NoteService(dead_store, live.assessor, live.clock)
    # The services are dependencies: swapped here for ones on a database that is not there.
    app.dependency_overrides[deps.notes_service] = lambda: dead
    app.dependency_overrides[deps.access] = lambda: Access(dead_store, live.clock)
    try:
        for r in (
            api.client.get("/readyz"),
            api.client.post("/notes", content=ROUTINE, headers=api.headers("submitter")),
        ):
            assert r.status_code == 503  # the token lookup itself needs the database
            assert r.json()["resourceType"] == "OperationOutcome"
        ready = api.client.get("/readyz")
        assert ready.status_code == 503
        assert ready.headers["retry-after"]
    finally:
        app.dependency_overrides.clear()
        api.client.portal.call(dead_store.aclose)  # in the app's loop, which opened it


def test_a_real_server_logs_no_traceback_for_an_unexpected_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    # Through uvicorn itself, as deployed: Starlette re-raises after answering, and uvicorn
    # would log the traceback with the exception's message; the guard must stop that.
    import socket
    import threading
    import time

    import httpx
    import uvicorn

    from capnote.app import create_app
    from capnote.config import Settings

    app = create_app(
        Settings(database_url=f"sqlite:///{tmp_path / 'g.sqlite3'}"), clock=lambda: NOW
    )
    secret, _ = new_token(f"sqlite:///{tmp_path / 'g.sqlite3'}", "auditor", "guard")

    def broken(*_args: object) -> None:
        raise RuntimeError("HX100234 secret detail")

    monkeypatch.setattr(app.state.notes, "get", broken)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="info"))
    thread = threading.Thread(target=server.run, daemon=True)
    caplog.set_level(logging.INFO)
    thread.start()
    try:
        while not server.started:
            time.sleep(0.05)
        r = httpx.get(
            f"http://127.0.0.1:{port}/notes/00000000-0000-0000-0000-000000000000",
            headers={"authorization": f"Bearer {secret}"},
            timeout=10,
        )
    finally:
        server.should_exit = True
        thread.join(timeout=20)
    assert r.status_code == 500
    assert "incident" in r.json()["issue"][0]["diagnostics"]
    assert "HX100234" not in caplog.text
    assert "Traceback" not in caplog.text
    assert "RuntimeError" in caplog.text  # the type and route are logged, nothing more


def test_a_nul_byte_in_a_search_is_the_callers_error(api: Api) -> None:
    """PostgreSQL cannot hold a NUL in text: its driver's refusal must come back as a 422
    that says why, the same on SQLite, never a 500."""
    h = api.headers("auditor")
    for url, params in (
        ("/notes", {"patient": "urn:oid:1.2.3|MRN\x00"}),
        ("/fhir/Procedure", {"patient:identifier": "urn:oid:1.2.3|MRN\x00"}),
        ("/audit", {"note": "a\x00"}),
    ):
        r = api.client.get(url, params=params, headers=h)
        assert r.status_code in (200, 422), (url, r.text[:300])
        if r.status_code == 422:
            assert r.json()["resourceType"] == "OperationOutcome"
