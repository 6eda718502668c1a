"""CI's short fault runs (tests/reliability/sqlite_faults.py): SIGKILL during writes on
SQLite with PRAGMA integrity_check afterwards, and a full disk (a small tmpfs, mounted as
root) under SQLite and under PostgreSQL, answered with 503 and Retry-After, losing nothing
acknowledged."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from tests.conftest import ROOT


def fault_run(which: str) -> str:
    run = subprocess.run(
        [
            sys.executable,
            "-m",
            "tests.reliability.sqlite_faults",
            "--notes",
            "150",
            "--only",
            which,
        ],
        capture_output=True,
        text=True,
        cwd=ROOT,
        timeout=600,
        check=False,
    )
    print(run.stdout)  # the figures, in the CI log
    assert run.returncode == 0, run.stdout + run.stderr[-3000:]
    assert "| lost                                   | 0 |" in run.stdout
    if which != "full-pg":
        assert "PRAGMA integrity_check: ok" in run.stdout
    return run.stdout


def test_sigkill_during_writes_loses_nothing_and_leaves_the_file_whole() -> None:
    out = fault_run("kill")
    assert out.count("killed with SIGKILL") == 2


def test_a_full_disk_answers_503_with_retry_after_and_loses_nothing() -> None:
    if os.geteuid() != 0:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("the full-disk run mounts a tmpfs and needs root; CI runs as root")
        pytest.skip("the full-disk run mounts a tmpfs, which needs root")
    out = fault_run("full")
    assert "| 503 without Retry-After                | 0 |" in out
    assert "| other 5xx answers                      | 0 |" in out


def test_a_full_disk_under_postgresql_answers_503_and_loses_nothing() -> None:
    if os.geteuid() != 0:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("the full-disk run mounts a tmpfs and needs root; CI runs as root")
        pytest.skip("the full-disk run mounts a tmpfs, which needs root")
    out = fault_run("full-pg")
    assert "tables read back: ok" in out
    assert "| 503 without Retry-After                | 0 |" in out
    assert "| other 5xx answers                      | 0 |" in out
