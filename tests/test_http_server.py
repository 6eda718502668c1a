"""The service over a real network: `capnote serve` processes on 127.0.0.1, a real SQLite file
or a real PostgreSQL, and concurrent duplicate submissions across two processes."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest
from sqlalchemy import create_engine, text

from tests.conftest import ROOT, VALID, on_store, routine
from tests.fhir_r4_check import r4_problems

CAPNOTE = [sys.executable, "-c", "from capnote.cli import main; main()"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def run_cli(database_url: str, *args: str) -> str:
    done = subprocess.run(
        [*CAPNOTE, *args],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=ROOT,
        env={**os.environ, "CAPNOTE_DATABASE_URL": database_url},
        check=True,
    )
    return done.stdout


@contextmanager
def server(
    database_url: str,
    workdir: Path,
    workers: int = 1,
    env: dict[str, str] | None = None,
    host: str = "127.0.0.1",
) -> Iterator[str]:
    """A `capnote serve` process (more settings in env); yields its base URL once /healthz
    answers."""
    port = free_port()
    log = (workdir / f"server-{port}.log").open("w")
    process = subprocess.Popen(
        [*CAPNOTE, "serve", "--host", host, "--port", str(port), "--workers", str(workers)],
        cwd=workdir,
        stdout=log,
        stderr=subprocess.STDOUT,
        env={
            **os.environ,
            "CAPNOTE_DATABASE_URL": database_url,
            "PYTHONPATH": str(ROOT / "service"),
            **(env or {}),
        },
    )
    base = f"http://{host}:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                if httpx.get(f"{base}/healthz", timeout=1).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError((workdir / f"server-{port}.log").read_text())
            time.sleep(0.2)
        yield base
    finally:
        process.terminate()
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
        log.close()


def token(database_url: str, role: str) -> str:
    # A clinician token belongs to a named person with a staff identifier.
    staff = ["--staff-id", "https://harbourside-eye.example/fhir/sid/staff|S-9"]
    extra = staff if role == "clinician" else []
    args = ("token", "new", "--role", role, "--label", f"http {role}", *extra)
    return run_cli(database_url, *args).split()[-1]


def test_submit_resend_and_read_over_http(database_url: str, tmp_path: Path) -> None:
    auth = {
        "authorization": f"Bearer {token(database_url, 'submitter')}",
        "content-type": "application/json",
    }
    with server(database_url, tmp_path) as base, httpx.Client(base_url=base, timeout=30) as http:
        body = (VALID[0]).read_bytes()
        first = http.post("/notes", content=body, headers=auth)
        again = http.post("/notes", content=body, headers=auth)
        assert (first.status_code, again.status_code) == (201, 200)
        key = first.json()["id"]
        procedure = http.get(f"/fhir/Procedure/{key}", headers=auth)
        assert procedure.headers["content-type"].startswith("application/fhir+json")
        assert r4_problems(procedure.json()) == []
        assert http.get("/readyz").json() == {"status": "ready"}
        assert http.get("/notes/x").status_code == 401
        assert http.get("/fhir/metadata").json()["resourceType"] == "CapabilityStatement"


def test_two_processes_racing_on_the_same_notes_store_each_once(
    database_url: str, tmp_path: Path
) -> None:
    # A database constraint, not process memory, makes the duplicates collapse: each note is
    # sent to both servers at the same instant.
    auth = {
        "authorization": f"Bearer {token(database_url, 'submitter')}",
        "content-type": "application/json",
    }
    notes = []
    for i in range(12):
        note = routine()
        note["note_id"]["value"] = f"LN-RACE-{i:03d}"
        notes.append(json.dumps(note).encode())
    with server(database_url, tmp_path) as one, server(database_url, tmp_path) as two:
        clients = [httpx.Client(base_url=b, timeout=60) for b in (one, two)]
        try:
            barrier = threading.Barrier(2)

            def send(pair: tuple[int, bytes]) -> int:
                index, body = pair
                barrier.wait(timeout=30)
                return clients[index % 2].post("/notes", content=body, headers=auth).status_code

            with ThreadPoolExecutor(max_workers=2) as pool:
                for body in notes:
                    statuses = sorted(pool.map(send, [(0, body), (1, body)]))
                    assert statuses == [200, 201], statuses
        finally:
            for c in clients:
                c.close()
    engine = create_engine(database_url)
    with engine.connect() as connection:
        rows = connection.execute(
            text("select note_key, count(*) from note_version group by note_key")
        ).all()
    engine.dispose()
    assert len(rows) == len(notes)
    assert all(n == 1 for _, n in rows)


def test_token_commands(database_url: str) -> None:
    created = run_cli(
        database_url, "token", "new", "--role", "auditor", "--label", "records office"
    )
    assert created.split()[-1].startswith("cap_")
    listing = run_cli(database_url, "token", "list")
    header, row = listing.splitlines()
    assert header.split("\t") == [
        "id",
        "role",
        "label",
        "staff",
        "created",
        "expires",
        "last used",
        "state",
    ]
    assert "auditor\trecords office\t-\t" in row
    assert row.endswith("\tnever\tnever\tlive")  # no expiry, never used
    assert created.split()[-1] not in listing  # only hashes are kept
    token_id = row.split()[0]
    person = run_cli(
        database_url,
        *("token", "new", "--role", "clinician", "--label", "Dr Ada Quill"),
        *(
            "--staff-id",
            "https://harbourside-eye.example/fhir/sid/staff|S-1",
            "--expires-days",
            "30",
        ),
    )
    assert "expires" in person
    clinician = run_cli(database_url, "token", "list").splitlines()[-1].split("\t")
    assert clinician[2:4] == ["Dr Ada Quill", "https://harbourside-eye.example/fhir/sid/staff|S-1"]
    assert clinician[5] != "never"
    assert clinician[7] == "live"
    nameless = subprocess.run(  # a clinician token must name its person
        [*CAPNOTE, "token", "new", "--role", "clinician", "--label", "x"],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=ROOT,
        check=False,
        env={**os.environ, "CAPNOTE_DATABASE_URL": database_url},
    )
    assert nameless.returncode == 2
    assert "--staff-id" in nameless.stderr
    assert "revoked" in run_cli(database_url, "token", "revoke", token_id)
    assert "revoked" in run_cli(database_url, "token", "list")
    bad = subprocess.run(
        [*CAPNOTE, "token", "new", "--role", "admin", "--label", "x"],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=ROOT,
        check=False,
        env={**os.environ, "CAPNOTE_DATABASE_URL": database_url},
    )
    assert bad.returncode == 2
    long = subprocess.run(  # longer than the column: refused alike on both engines
        [*CAPNOTE, "token", "new", "--role", "auditor", "--label", "x" * 101],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=ROOT,
        check=False,
        env={**os.environ, "CAPNOTE_DATABASE_URL": database_url},
    )
    assert long.returncode == 2, long.stderr
    assert "1 to 100 characters" in long.stderr
    assert "Traceback" not in long.stderr
    assert run_cli(database_url, "token", "list").count("\n") == 3  # header and two tokens
    # Each token made or revoked is in the audit trail, by token id (issue 14, §7).
    trail = on_store(database_url, lambda store: store.audit_entries(None, 0, 10))
    assert [(e.action, e.token_id) for e in trail][-3:] == [
        ("token-revoke", int(token_id)),
        ("token-create", int(person.split()[1])),
        ("token-create", int(token_id)),
    ]


def test_a_forwarded_address_longer_than_the_audit_column(
    database_url: str, tmp_path: Path
) -> None:
    """uvicorn trusts X-Forwarded-For from 127.0.0.1; the security tester's 65 characters
    gave a 500 on PostgreSQL. Now a 422 that names the header, on both engines, and the
    note is not stored."""
    auth = {
        "authorization": f"Bearer {token(database_url, 'submitter')}",
        "content-type": "application/json",
    }
    with server(database_url, tmp_path) as base, httpx.Client(base_url=base, timeout=30) as http:
        body = VALID[0].read_bytes()
        r = http.post("/notes", content=body, headers={**auth, "x-forwarded-for": "9" * 65})
        assert r.status_code == 422, r.text
        assert r.json()["issue"][0]["expression"] == ["X-Forwarded-For"]
        fine = http.post("/notes", content=body, headers={**auth, "x-forwarded-for": "10.1.2.3"})
        assert fine.status_code == 201, fine.text


@pytest.fixture(autouse=True)
def _isolated_cwd(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # serve's default SQLite file lands in the working directory; keep it out of the repo.
    monkeypatch.chdir(tmp_path)


def test_two_workers_share_one_port(database_url: str, tmp_path: Path) -> None:
    auth = {
        "authorization": f"Bearer {token(database_url, 'submitter')}",
        "content-type": "application/json",
    }
    with (
        server(database_url, tmp_path, workers=2) as base,
        httpx.Client(base_url=base, timeout=30) as http,
    ):
        statuses = []
        for i in range(20):
            note = routine()
            note["note_id"]["value"] = f"LN-WORKERS-{i:03d}"
            statuses.append(http.post("/notes", content=json.dumps(note), headers=auth).status_code)
        assert statuses == [201] * 20
