"""The benchmark runs end to end (bench/run.py --smoke): every part starts what it needs,
measures and prints its table. No figure is asserted: speed is the benchmark's business,
and a timed assertion in the suite would fail on a busy machine rather than on a slow change.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT
from tests.pg_cluster import available, required


def test_the_benchmark_smoke_run_prints_its_table(tmp_path: Path) -> None:
    if not available() and required():
        pytest.fail("PostgreSQL is needed for the benchmark's PostgreSQL rows in CI")
    run = subprocess.run(
        [sys.executable, str(ROOT / "bench" / "run.py"), "--smoke", "--out", str(tmp_path)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=900,
        check=False,
        env={**os.environ, "PYTHONPATH": f"{ROOT / 'service'}{os.pathsep}{ROOT}"},
    )
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-3000:]
    [written] = list(tmp_path.glob("*-smoke.md"))
    table = written.read_text()
    for part in (
        "POST raw body (ceiling)",
        "| POST /notes | SQLite, 1 worker(s)",
        "| POST /notes | SQLite, 2 worker(s)",
        "POST /notes, obvious (R4B + ORM)",
        "POST /notes, output checked with R4B",
        "GET /fhir/Procedure/{id}",
        "GET /fhir/Procedure?patient:identifier=",
        "capnote check NDJSON",
        "emission floor",
    ):
        assert part in table, part
    if available():
        assert "| POST /notes | PostgreSQL, 2 worker(s)" in table
    # Every measured POST stored a new note, and every target has a verdict.
    assert "answered 201 (a new note stored): yes" in table
    assert table.count("| PASS |") + table.count("| MISS |") >= 9
