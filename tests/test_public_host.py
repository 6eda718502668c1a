"""The Host header never reaches a link (issue 16, §3): with CAPNOTE_PUBLIC_BASE_URL set,
every link capnote writes is built from it, and a Host outside CAPNOTE_ALLOWED_HOSTS is
refused, over a real `capnote serve` process."""

from __future__ import annotations

import json
from pathlib import Path

import httpx

from tests.conftest import ROOT
from tests.test_http_server import server, token

PUBLIC = "https://capnote.hospital.example"


def test_links_follow_the_public_base_url_and_foreign_hosts_are_refused(
    database_url: str, tmp_path: Path
) -> None:
    reader = token(database_url, "analyst")
    writer = token(database_url, "submitter")
    env = {
        "CAPNOTE_PUBLIC_BASE_URL": PUBLIC,
        "CAPNOTE_ALLOWED_HOSTS": json.dumps(["127.0.0.1", "localhost"]),
    }
    with server(database_url, tmp_path, env=env) as url:
        note = (ROOT / "examples" / "notes" / "right-routine.json").read_text()
        stored = httpx.post(
            f"{url}/notes",
            content=note,
            headers={"authorization": f"Bearer {writer}", "content-type": "application/json"},
        )
        assert stored.status_code == 201
        attacker = httpx.get(
            f"{url}/fhir/Procedure",
            headers={"host": "attacker.example", "authorization": f"Bearer {reader}"},
        )
        assert attacker.status_code == 400
        assert attacker.json()["resourceType"] == "OperationOutcome"
        assert "attacker" not in attacker.text
        assert attacker.headers["x-content-type-options"] == "nosniff"
        metadata = httpx.get(f"{url}/fhir/metadata").json()
        assert metadata["implementation"]["url"] == f"{PUBLIC}/fhir"
        search = httpx.get(
            f"{url}/fhir/Procedure",
            params={"_count": "1"},
            headers={"authorization": f"Bearer {reader}"},
        ).json()
        links = [link["url"] for link in search["link"]]
        assert links
        assert all(link.startswith(f"{PUBLIC}/fhir/Procedure") for link in links), links
        # The public host itself is served (a proxy passes it on).
        assert (
            httpx.get(f"{url}/healthz", headers={"host": "capnote.hospital.example"}).status_code
            == 200
        )
