"""Security headers and CORS as configured."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from capnote.app import create_app
from capnote.config import Settings
from tests.conftest import NOW, Api, new_token


@pytest.fixture
def client(tmp_path: Path) -> Iterator[TestClient]:
    settings = Settings(
        database_url=f"sqlite:///{tmp_path / 'h.sqlite3'}",
        cors_origins=["https://ehr.harbourside-eye.example"],
    )
    app = create_app(settings, clock=lambda: NOW)
    with TestClient(app) as c:
        yield c


def test_security_headers_on_every_answer(client: TestClient) -> None:
    for r in (client.get("/healthz"), client.get("/notes/x"), client.get("/fhir/metadata")):
        assert r.headers["x-content-type-options"] == "nosniff"
        assert "frame-ancestors 'none'" in r.headers["content-security-policy"]
        assert r.headers["cache-control"] == "no-store"


def test_cors_only_for_configured_origins(client: TestClient) -> None:
    preflight = {
        "access-control-request-method": "POST",
        "access-control-request-headers": "authorization,content-type",
    }
    ok = client.options(
        "/notes", headers={"origin": "https://ehr.harbourside-eye.example", **preflight}
    )
    assert ok.headers["access-control-allow-origin"] == "https://ehr.harbourside-eye.example"
    other = client.options("/notes", headers={"origin": "https://elsewhere.example", **preflight})
    assert "access-control-allow-origin" not in other.headers


def test_no_cors_by_default(tmp_path: Path) -> None:
    app = create_app(
        Settings(database_url=f"sqlite:///{tmp_path / 'n.sqlite3'}"), clock=lambda: NOW
    )
    with TestClient(app) as c:
        r = c.get("/healthz", headers={"origin": "https://elsewhere.example"})
        assert "access-control-allow-origin" not in r.headers


def _secured(r: object) -> None:
    headers = r.headers  # type: ignore[attr-defined]
    assert headers["x-content-type-options"] == "nosniff"
    assert headers["cache-control"] == "no-store"
    assert headers["content-type"].startswith("application/fhir+json")


def test_answers_from_the_middleware_carry_the_headers_too(tmp_path: Path) -> None:
    """The 413 the body limit sends before the app and the 500 of the last-resort guard."""
    url = f"sqlite:///{tmp_path / 'm.sqlite3'}"
    app = create_app(Settings(database_url=url, max_body_bytes=1000), clock=lambda: NOW)
    # A real token: a 413 while streaming is only reached once the caller is known.
    sender = {**_JSON, "authorization": f"Bearer {new_token(url, 'submitter', 'm')[0]}"}

    async def broken() -> None:
        raise RuntimeError("a bug with a patient's name in its message")

    app.add_api_route("/broken", broken)
    with TestClient(app, raise_server_exceptions=False) as c:
        declared = c.post("/notes", content=b"{" + b" " * 2000 + b"}", headers=_JSON)
        assert declared.status_code == 413
        assert declared.json()["issue"][0]["code"] == "too-costly"
        _secured(declared)

        def chunks() -> Iterator[bytes]:  # no Content-Length: counted as it streams
            yield b"{" + b" " * 600
            yield b" " * 600 + b"}"

        streamed = c.post("/notes", content=chunks(), headers=sender)
        assert streamed.status_code == 413
        assert streamed.json() == declared.json()
        _secured(streamed)

        failed = c.get("/broken")
        assert failed.status_code == 500
        text = failed.text
        assert "incident" in text
        assert "patient" not in text
        _secured(failed)


def test_a_bad_query_parameter_is_named(api: Api) -> None:
    r = api.client.get(
        "/fhir/Procedure", params={"_count": "many"}, headers=api.headers("clinician")
    )
    # FHIR R4 search: a search the server cannot run is a 400.
    assert r.status_code == 400, r.text
    [issue] = r.json()["issue"]
    assert issue["expression"] == ["_count"]
    assert issue["details"]["coding"][0]["code"] == "search-invalid"
    assert "_count must be a whole number" in issue["diagnostics"]
    assert "value: many" in issue["diagnostics"]
    _secured(r)


_JSON = {"content-type": "application/json"}
