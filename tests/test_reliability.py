"""CI's short fault run (tests/reliability/fault_run.py) and concurrent SQLite writers."""

from __future__ import annotations

import json
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import httpx
import pytest

from tests.conftest import ROOT, routine
from tests.pg_fixtures import require_postgres
from tests.test_http_server import server, token


@pytest.mark.postgres
def test_short_fault_run_loses_nothing() -> None:
    require_postgres()
    run = subprocess.run(
        [sys.executable, "-m", "tests.reliability.fault_run", "--notes", "200"],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=600,
        check=False,
    )
    print(run.stdout)  # the figures, in the CI log
    assert run.returncode == 0, run.stdout + run.stderr[-3000:]
    assert "| lost                                   | 0 |" in run.stdout


def test_sqlite_under_concurrent_writers_never_says_locked(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'shared.sqlite3'}"
    auth = {
        "authorization": f"Bearer {token(url, 'submitter')}",
        "content-type": "application/json",
    }
    bodies = []
    for i in range(120):
        note = routine()
        note["note_id"]["value"] = f"LN-SQLITE-{i:04d}"
        bodies.append(json.dumps(note).encode())
    with server(url, tmp_path) as one, server(url, tmp_path) as two:
        bases = [one, two]

        def post(i: int) -> int:
            return httpx.post(
                f"{bases[i % 2]}/notes", content=bodies[i], headers=auth, timeout=60
            ).status_code

        with ThreadPoolExecutor(max_workers=8) as pool:
            statuses = list(pool.map(post, range(len(bodies))))
    assert statuses == [201] * len(bodies)
