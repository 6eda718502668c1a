"""The repository keeps its promises: CI runs README's test command, the code is typed and
linted, and nothing cites what the project must not cite."""

from __future__ import annotations

import shutil
import subprocess
import sys

import pytest

from tests.conftest import ROOT


def test_ci_runs_the_readme_test_command() -> None:
    command = (ROOT / ".ci" / "run").read_text().strip().splitlines()[-1]
    assert "pytest" in command
    assert command in (ROOT / "README.md").read_text()


def test_readme_opens_with_the_job_and_the_caution() -> None:
    text = (ROOT / "README.md").read_text()
    first_paragraph = text.split("\n\n")[1]
    assert "capsulotomy" in first_paragraph
    assert "FHIR R4" in first_paragraph
    assert "treating clinician decide" in text


@pytest.mark.parametrize(
    "command",
    [
        [sys.executable, "-m", "ruff", "check", "service", "tests", "bench", "examples"],
        [
            sys.executable,
            "-m",
            "ruff",
            "format",
            "--check",
            "service",
            "tests",
            "bench",
            "examples",
        ],
        [sys.executable, "-m", "mypy"],
    ],
    ids=["ruff", "ruff-format", "mypy-strict"],
)
def test_code_quality(command: list[str]) -> None:
    if shutil.which(command[0]) is None:
        pytest.fail(f"{command[0]} missing")
    run = subprocess.run(
        command, cwd=ROOT, capture_output=True, text=True, timeout=300, check=False
    )
    assert run.returncode == 0, run.stdout + run.stderr
