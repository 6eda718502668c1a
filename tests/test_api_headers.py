"""Security headers and CORS as configured."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from capnote.app import create_app
from capnote.config import Settings
from tests.conftest import NOW


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
