"""capnote's FHIR package: the profiles of what it emits, its CodeSystem and its ValueSets.

Built here as plain R4 resources (StructureDefinitions with a differential, constraining
the core resources), written to schemas/fhir-package/ by `python -m capnote.fhir.profiles`
(a test compares the files), served under /fhir/StructureDefinition, /fhir/CodeSystem and
/fhir/ValueSet, and used by $validate's `profile` parameter (capnote.fhir.profile_check).
The package's version is the release's (capnote.__version__).

The profiles constrain what identifies each kind of resource (its code), what capnote
always sends (identifier, subject, times, units) and nothing that a site setting changes
(the region's diagnosis and procedure codes, drug codes).
"""

from __future__ import annotations

import json
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Final

from capnote import __version__
from capnote.fhir.codes import CANONICAL, CAPNOTE_CS, CONCEPTS, LOINC, UCUM, code_system_resource

PACKAGE_NAME: Final = "org.capnote.fhir"
SD_BASE: Final = f"{CANONICAL}/StructureDefinition"
VS_BASE: Final = f"{CANONICAL}/ValueSet"
_CORE: Final = "http://hl7.org/fhir/StructureDefinition/"
_RELEASED: Final = "2026-12-04"
PACKAGE_DIR: Final = Path(__file__).resolve().parents[3] / "schemas" / "fhir-package"


@dataclass(frozen=True)
class ValueSetSpec:
    """A ValueSet of listed codes, or of every code of capnote's CodeSystem."""

    id: str
    title: str
    codes: tuple[tuple[str, str], ...]  # (system, code); empty: the whole CodeSystem


VALUE_SETS: Final = (
    ValueSetSpec(
        "capnote-iop-codes",
        "Intraocular pressure by eye (LOINC 79892-6 right, 79893-4 left)",
        ((LOINC, "79892-6"), (LOINC, "79893-4")),
    ),
    ValueSetSpec(
        "capnote-visual-acuity-codes",
        "Visual acuity: best-corrected Snellen by eye (LOINC), or as entered (capnote)",
        ((LOINC, "79880-1"), (LOINC, "79881-9"), (CAPNOTE_CS, "visual-acuity")),
    ),
    ValueSetSpec(
        "capnote-follow-up",
        "Follow-up after Nd:YAG posterior capsulotomy",
        (
            (CAPNOTE_CS, "iop-recheck"),
            (CAPNOTE_CS, "next-day-iop-check"),
            (CAPNOTE_CS, "capsulotomy-review"),
        ),
    ),
    ValueSetSpec("capnote-all", "Every capnote code", ()),
)


@dataclass(frozen=True)
class ObservationKind:
    """One kind of Observation capnote emits."""

    id: str
    title: str
    code: str | None  # capnote's code (a pattern), or None when value_set says
    value_set: str | None
    unit: str | None  # the UCUM code of valueQuantity; None: no Quantity value
    value_type: str | None  # "Quantity", "string" or None (components only)


OBSERVATIONS: Final = (
    ObservationKind(
        "capnote-iop", "Intraocular pressure", None, "capnote-iop-codes", "mm[Hg]", "Quantity"
    ),
    ObservationKind(
        "capnote-visual-acuity",
        "Visual acuity",
        None,
        "capnote-visual-acuity-codes",
        None,
        "string",
    ),
    ObservationKind("capnote-laser-series", "Laser series", "laser-series", None, None, None),
    ObservationKind(
        "capnote-total-energy", "Total laser energy", "total-energy", None, "mJ", "Quantity"
    ),
    ObservationKind(
        "capnote-total-pulses",
        "Total number of pulses",
        "total-pulses",
        None,
        "{pulses}",
        "Quantity",
    ),
    ObservationKind(
        "capnote-focal-fluence",
        "Idealised focal fluence",
        "focal-fluence-idealised",
        None,
        "J/cm2",
        "Quantity",
    ),
    ObservationKind(
        "capnote-cumulative-energy",
        "Cumulative laser energy, this eye",
        "cumulative-energy",
        None,
        "mJ",
        "Quantity",
    ),
    ObservationKind(
        "capnote-opening-size", "Capsule opening size", "opening-size", None, None, None
    ),
    ObservationKind(
        "capnote-opening-area", "Capsule opening area", "opening-area", None, "mm2", "Quantity"
    ),
    ObservationKind(
        "capnote-iop-change",
        "IOP change after the laser",
        "iop-change",
        None,
        "mm[Hg]",
        "Quantity",
    ),
)


def _element(path: str, **rules: Any) -> dict[str, Any]:
    return {"id": path, "path": path, **rules}


def _patient(path: str) -> dict[str, Any]:
    return _element(path, min=1, type=[{"code": "Reference", "targetProfile": [_CORE + "Patient"]}])


def _required(path: str, value_set: str) -> dict[str, Any]:
    return _element(path, binding={"strength": "required", "valueSet": f"{VS_BASE}/{value_set}"})


def _capnote_code(path: str, code: str) -> dict[str, Any]:
    return _element(path, patternCodeableConcept={"coding": [{"system": CAPNOTE_CS, "code": code}]})


def _structure(
    ident: str, title: str, kind: str, description: str, elements: list[dict[str, Any]]
) -> dict[str, Any]:
    name = "".join(part.capitalize() for part in ident.split("-"))
    return {
        "resourceType": "StructureDefinition",
        "id": ident,
        "url": f"{SD_BASE}/{ident}",
        "version": __version__,
        "name": name,
        "title": title,
        "status": "active",
        "experimental": False,
        "date": _RELEASED,
        "publisher": "capnote",
        "description": description,
        "fhirVersion": "4.0.1",
        "kind": "resource",
        "abstract": False,
        "type": kind,
        "baseDefinition": _CORE + kind,
        "derivation": "constraint",
        "differential": {"element": [_element(kind), *elements]},
    }


def _observation(spec: ObservationKind) -> dict[str, Any]:
    elements = [
        _element("Observation.identifier", min=1),
        _element("Observation.category", min=1),
        _required("Observation.code", spec.value_set)
        if spec.value_set
        else _capnote_code("Observation.code", str(spec.code)),
        _patient("Observation.subject"),
        _element("Observation.effective[x]", min=1, type=[{"code": "dateTime"}]),
        _element("Observation.bodySite", min=1),
        _element(
            "Observation.partOf",
            min=1,
            type=[{"code": "Reference", "targetProfile": [_CORE + "Procedure"]}],
        ),
    ]
    if spec.value_type is None:
        elements += [
            _element("Observation.value[x]", max="0"),
            _element("Observation.component", min=1),
        ]
    else:
        elements.append(_element("Observation.value[x]", min=1, type=[{"code": spec.value_type}]))
    if spec.unit is not None:
        elements += [
            _element("Observation.value[x].system", min=1, fixedUri=UCUM),
            _element("Observation.value[x].code", min=1, fixedCode=spec.unit),
        ]
    return _structure(
        spec.id,
        f"capnote Observation: {spec.title}",
        "Observation",
        f"{spec.title}, as capnote records it for an Nd:YAG posterior capsulotomy session.",
        elements,
    )


def structure_definitions() -> list[dict[str, Any]]:
    """Every profile of the package."""
    out = [
        _structure(
            "capnote-procedure",
            "capnote Procedure: Nd:YAG laser posterior capsulotomy",
            "Procedure",
            "One Nd:YAG laser posterior capsulotomy session on one eye.",
            [
                _element("Procedure.identifier", min=1),
                {**_capnote_code("Procedure.code", "yag-posterior-capsulotomy"), "min": 1},
                _patient("Procedure.subject"),
                _element("Procedure.performed[x]", min=1, type=[{"code": "Period"}]),
                _element("Procedure.bodySite", min=1),
            ],
        ),
        *(_observation(spec) for spec in OBSERVATIONS),
        _structure(
            "capnote-follow-up",
            "capnote ServiceRequest: a follow-up check",
            "ServiceRequest",
            "A follow-up check after the laser, with its window.",
            [
                _element("ServiceRequest.identifier", min=1),
                _element("ServiceRequest.intent", fixedCode="order"),
                {**_required("ServiceRequest.code", "capnote-follow-up"), "min": 1},
                _patient("ServiceRequest.subject"),
                _element("ServiceRequest.occurrence[x]", min=1, type=[{"code": "Timing"}]),
            ],
        ),
        _structure(
            "capnote-medication-administration",
            "capnote MedicationAdministration: drops given in clinic",
            "MedicationAdministration",
            "Eye drops given in clinic around the laser.",
            [
                _element("MedicationAdministration.identifier", min=1),
                _patient("MedicationAdministration.subject"),
                _element("MedicationAdministration.effective[x]", type=[{"code": "dateTime"}]),
                _element("MedicationAdministration.dosage", min=1),
            ],
        ),
        _structure(
            "capnote-medication-request",
            "capnote MedicationRequest: drops taken home",
            "MedicationRequest",
            "Eye drops prescribed to take home after the laser.",
            [
                _element("MedicationRequest.identifier", min=1),
                _element("MedicationRequest.intent", fixedCode="order"),
                _patient("MedicationRequest.subject"),
                _element("MedicationRequest.dosageInstruction", min=1),
            ],
        ),
    ]
    return out


def value_sets() -> list[dict[str, Any]]:
    """Every ValueSet of the package."""
    out = []
    for spec in VALUE_SETS:
        if spec.codes:
            systems: dict[str, list[dict[str, str]]] = {}
            for system, code in spec.codes:
                systems.setdefault(system, []).append({"code": code})
            include = [{"system": s, "concept": c} for s, c in systems.items()]
        else:
            include = [{"system": CAPNOTE_CS}]
        out.append(
            {
                "resourceType": "ValueSet",
                "id": spec.id,
                "url": f"{VS_BASE}/{spec.id}",
                "version": __version__,
                "name": "".join(part.capitalize() for part in spec.id.split("-")),
                "title": spec.title,
                "status": "active",
                "experimental": False,
                "date": _RELEASED,
                "publisher": "capnote",
                "description": spec.title + ".",
                "compose": {"include": include},
            }
        )
    return out


def expansion(url: str) -> frozenset[tuple[str, str]] | None:
    """(system, code) of one of the package's ValueSets; None for another URL."""
    for spec in VALUE_SETS:
        if f"{VS_BASE}/{spec.id}" == url.split("|")[0]:
            if spec.codes:
                return frozenset(spec.codes)
            return frozenset((CAPNOTE_CS, code) for code in CONCEPTS)
    return None


def resources() -> dict[str, list[dict[str, Any]]]:
    """The package's resources by type."""
    return {
        "StructureDefinition": structure_definitions(),
        "CodeSystem": [code_system_resource()],
        "ValueSet": value_sets(),
    }


def profile(url: str) -> dict[str, Any] | None:
    """One of the package's StructureDefinitions by canonical URL (a |version is ignored)."""
    base = url.split("|")[0]
    return next((sd for sd in structure_definitions() if sd["url"] == base), None)


def manifest() -> dict[str, Any]:
    """package.json (the FHIR package manifest, NPM style)."""
    return {
        "name": PACKAGE_NAME,
        "version": __version__,
        "description": "capnote's FHIR R4 profiles, CodeSystem and ValueSets",
        "fhirVersions": ["4.0.1"],
        "dependencies": {"hl7.fhir.r4.core": "4.0.1"},
        "author": "capnote",
        "canonical": CANONICAL,
        "license": "Apache-2.0",
    }


def files() -> dict[str, str]:
    """The package as files: name -> text."""
    out = {"package.json": json.dumps(manifest(), indent=2) + "\n"}
    for kind, items in resources().items():
        for item in items:
            out[f"{kind}-{item['id']}.json"] = json.dumps(item, indent=2, ensure_ascii=False) + "\n"
    return out


def main() -> int:
    """Write the package to schemas/fhir-package/."""
    PACKAGE_DIR.mkdir(parents=True, exist_ok=True)
    for old in PACKAGE_DIR.glob("*.json"):
        old.unlink()
    for name, text in files().items():
        (PACKAGE_DIR / name).write_text(text, encoding="utf-8")
    print(f"wrote {len(files())} files to {PACKAGE_DIR}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())


def profile_for(resource: dict[str, Any]) -> str | None:
    """The canonical URL of the profile an emitted resource conforms to (for meta.profile),
    by its type and, for an Observation, its code; None for what no profile covers."""
    kind = resource.get("resourceType")
    fixed = {
        "Procedure": "capnote-procedure",
        "ServiceRequest": "capnote-follow-up",
        "MedicationAdministration": "capnote-medication-administration",
        "MedicationRequest": "capnote-medication-request",
    }
    if isinstance(kind, str) and kind in fixed:
        return f"{SD_BASE}/{fixed[kind]}"
    if kind != "Observation":
        return None
    code = resource.get("code")
    codings = code.get("coding", []) if isinstance(code, dict) else []
    pairs = {(c.get("system"), c.get("code")) for c in codings if isinstance(c, dict)}
    for spec in OBSERVATIONS:
        if spec.code is not None and (CAPNOTE_CS, spec.code) in pairs:
            return f"{SD_BASE}/{spec.id}"
        members = expansion(f"{VS_BASE}/{spec.value_set}") if spec.value_set else None
        if members and pairs & members:
            return f"{SD_BASE}/{spec.id}"
    return None
