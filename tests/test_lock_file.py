"""requirements.lock against pyproject.toml (issue 16, section 5): every runtime dependency
is pinned inside its range with hashes (pip's hash-checking mode, "Secure installs" in
pip's documentation), and the image installs from the lock alone."""

from __future__ import annotations

import re
import tomllib

from packaging.requirements import Requirement
from packaging.utils import canonicalize_name

from tests.conftest import ROOT

LOCK = ROOT / "requirements.lock"


def locked() -> dict[str, tuple[str, str, list[str]]]:
    """name -> (version, marker text, hashes), from the lock's requirement lines."""
    text = re.sub(r"\\\n\s*", " ", LOCK.read_text())  # join continued lines
    pins: dict[str, tuple[str, str, list[str]]] = {}
    for line in text.splitlines():
        line = line.split(" #", 1)[0].strip()
        if not line or line.startswith("#"):
            continue
        spec, hashes = (
            line.split("--hash=", 1)[0],
            re.findall(r"--hash=sha256:([0-9a-f]{64})", line),
        )
        name_version, _, marker = spec.partition(";")
        name, version = name_version.strip().split("==")
        pins[canonicalize_name(name)] = (version, marker.strip(), hashes)
    return pins


def runtime_requirements() -> list[Requirement]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    return [Requirement(line) for line in project["dependencies"]]


def test_every_line_is_pinned_with_hashes() -> None:
    pins = locked()
    assert len(pins) >= len(runtime_requirements())
    for name, (version, _marker, hashes) in pins.items():
        assert re.fullmatch(r"[0-9][0-9A-Za-z.+!-]*", version), name
        assert hashes, f"{name} has no hash"


def test_every_runtime_dependency_is_locked_inside_its_range() -> None:
    pins = locked()
    for requirement in runtime_requirements():
        name = canonicalize_name(requirement.name)
        assert name in pins, f"{name} is not in requirements.lock"
        version, marker, _hashes = pins[name]
        assert requirement.specifier.contains(version, prereleases=True), (name, version)
        if requirement.marker is not None:  # uvloop: not on Windows
            assert marker, f"{name} lost its marker {requirement.marker}"
        for extra in requirement.extras:  # psycopg[binary] -> psycopg-binary
            assert canonicalize_name(f"{name}-{extra}") in pins, (name, extra)


def test_the_image_installs_the_lock_with_hashes_and_capnote_alone() -> None:
    dockerfile = (ROOT / "docker" / "Dockerfile").read_text()
    final = dockerfile.split("\nFROM ")[-1]
    assert "COPY requirements.lock" in final
    assert "--require-hashes" in final
    assert re.search(r"pip install [^\n]*--no-deps [^\n]*capnote-\*\.whl", final)
