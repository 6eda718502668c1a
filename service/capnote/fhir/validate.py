"""Validate FHIR R4 resources for the interface analyst.

The judge is R4 itself, as the official core package words it (capnote.fhir.core_table,
generated from hl7.fhir.r4.core 4.0.1): structure, JSON types and formats, reference
targets and required bindings (capnote.fhir.conformance), and the core invariants
(capnote.fhir.invariants). The fhir.resources R4B models are not used here: they coerce
JSON types that R4 refuses and check few bindings.
"""

from __future__ import annotations

from typing import Any

from capnote.fhir import core_table, invariants, profiles
from capnote.fhir.conformance import problem, walk
from capnote.fhir.profile_check import check_profile
from capnote.findings import Finding, Severity, bounded

CORE_PROFILE = "http://hl7.org/fhir/StructureDefinition/"


def validate_resource(data: object, profile: str | None = None) -> list[Finding]:
    """Every problem in one FHIR resource (a Bundle's entries and contained resources
    included), against its R4 definition or the profile named."""
    walker = walk(data)
    found = walker.findings + invariants.evaluate(walker)
    if isinstance(data, dict):
        found += _profiles(data, profile)
    return bounded(found)


def _profiles(data: dict[str, Any], profile: str | None) -> list[Finding]:
    kind = data.get("resourceType")
    out: list[Finding] = []
    if profile is not None:
        base = profile.split("|")[0]
        own = profiles.profile(base)
        if own is not None:
            if own["type"] != kind:
                out.append(_wrong_type(base, str(own["type"]), kind))
            else:
                out += check_profile(data, own)
        elif not base.startswith(CORE_PROFILE) or not core_table.is_resource_type(
            base.removeprefix(CORE_PROFILE)
        ):
            out.append(
                problem(
                    "fhir-profile-unknown",
                    "profile",
                    f"profile {profile[:200]!r} is not known here, so the resource was not "
                    "checked against it",
                    "$validate profile: a StructureDefinition this server has (the R4 core "
                    "resource definitions and capnote's own, under /fhir/StructureDefinition)",
                    "not-supported",
                    value=profile[:200],
                    allowed=CORE_PROFILE + "[resource type]",
                )
            )
        elif base.removeprefix(CORE_PROFILE) != kind:
            out.append(_wrong_type(base, base.removeprefix(CORE_PROFILE), kind))
    meta = data.get("meta")
    declared = meta.get("profile") if isinstance(meta, dict) else None
    for i, url in enumerate(declared if isinstance(declared, list) else []):
        if isinstance(url, str) and url.split("|")[0] == profile:
            continue  # checked above
        own = profiles.profile(url) if isinstance(url, str) else None
        if own is not None and own["type"] == kind:
            out += check_profile(data, own)  # a declared profile capnote publishes
        elif isinstance(url, str) and url.split("|")[0] != f"{CORE_PROFILE}{kind}":
            out.append(
                Finding(
                    severity=Severity.INFORMATION,
                    code="fhir-profile-not-checked",
                    location=f"{kind}.meta.profile[{i}]",
                    message=f"the resource claims profile {url[:200]}, which is not known "
                    "here: it was checked against the R4 core definition only",
                    rule="$validate checks the profiles it knows",
                    issue_type="informational",
                )
            )
    return out


def _wrong_type(url: str, profiled: str, kind: object) -> Finding:
    return problem(
        "fhir-profile-type",
        "resourceType",
        f"profile {url} is for {profiled}, not {kind}",
        "a profile constrains one resource type",
        "invalid",
    )
