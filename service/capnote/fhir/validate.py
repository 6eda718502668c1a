"""Validate FHIR resources for the interface analyst: structure, required codes, Bundle rules.

Structure is checked with fhir.resources' R4B models. R4B's Procedure, Observation,
ServiceRequest, MedicationRequest, MedicationAdministration, Bundle and OperationOutcome
have the same elements as R4's, so for the resources capnote deals in an R4B pass is an R4
pass; other types are checked as R4B and the report says so.
"""

from __future__ import annotations

from collections import Counter
from typing import Any

from fhir.resources.R4B import get_fhir_model_class
from fhir.resources.R4B.resource import Resource
from pydantic import ValidationError

from capnote.fhir.bindings import binding_problems
from capnote.findings import Finding, Severity, bounded, show_value
from capnote.rules.contract import finding_from_error

SAME_IN_R4 = frozenset(
    {
        "Procedure",
        "Observation",
        "ServiceRequest",
        "MedicationRequest",
        "MedicationAdministration",
        "Bundle",
        "OperationOutcome",
        "CodeSystem",
    }
)
_RULE = "FHIR R4 structure (checked with R4B models)"


def _error(code: str, location: str, message: str, rule: str, issue_type: str) -> Finding:
    return Finding(
        severity=Severity.ERROR,
        code=code,
        location=location,
        message=message,
        rule=rule,
        issue_type=issue_type,
    )


def _structure(kind: str, data: dict[str, Any]) -> list[Finding]:
    try:
        model = get_fhir_model_class(kind)
        if not issubclass(model, Resource):  # a data type such as Coding is no resource
            raise KeyError(kind)
    except (KeyError, ValueError):
        return [
            _error(
                "fhir-unknown-type",
                "resourceType",
                f"{kind!r} is not a FHIR resource type",
                "resourceType names a FHIR resource",
                "not-supported",
            )
        ]
    try:
        model.model_validate(data)
    except ValidationError as exc:
        return [
            finding_from_error(e, root=kind, code="fhir-structure", rule=_RULE)
            for e in exc.errors(include_url=False)
        ]
    except (TypeError, ValueError) as exc:
        # fhir.resources raises plain ValueErrors from some of its own validators.
        return [_error("fhir-structure", kind, f"{kind}: {exc}", _RULE, "structure")]
    return []


def _bundle_rules(data: dict[str, Any]) -> list[Finding]:
    entries = data.get("entry") or []
    if not isinstance(entries, list):
        return []
    out: list[Finding] = []
    urls = Counter(e.get("fullUrl") for e in entries if isinstance(e, dict) and e.get("fullUrl"))
    for i, entry in enumerate(entries):
        if not isinstance(entry, dict):
            continue
        url = entry.get("fullUrl")
        if url and urls[url] > 1:
            out.append(
                _error(
                    "bundle-duplicate-fullurl",
                    f"Bundle.entry[{i}].fullUrl",
                    f"fullUrl {url} appears {urls[url]} times",
                    "bdl-7: fullUrl is unique within a Bundle",
                    "invariant",
                )
            )
        if data.get("type") in ("transaction", "batch") and "request" not in entry:
            out.append(
                _error(
                    "bundle-entry-request",
                    f"Bundle.entry[{i}]",
                    "a transaction or batch entry needs a request",
                    "bdl-3: entry.request is mandatory for batch and transaction",
                    "invariant",
                )
            )
    return out


def _contained(data: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    entries = data.get("entry") if data.get("resourceType") == "Bundle" else None
    if not isinstance(entries, list):
        return []
    return [
        (f"Bundle.entry[{i}].resource", e["resource"])
        for i, e in enumerate(entries)
        if isinstance(e, dict) and isinstance(e.get("resource"), dict)
    ]


def _codes(resource: dict[str, Any], prefix: str) -> list[Finding]:
    """Required-binding findings, located under prefix (the resource's place in the payload)."""
    kind = str(resource.get("resourceType"))
    out = []
    for where, value, value_set in binding_problems(resource):
        location = prefix + where.removeprefix(kind)
        out.append(
            Finding(
                severity=Severity.ERROR,
                code="fhir-code-not-in-value-set",
                location=location,
                message=f"{location}: {value!r} is not in the required value set {value_set}",
                rule=f"required binding to http://hl7.org/fhir/ValueSet/{value_set}",
                value=show_value("", value),
                issue_type="code-invalid",
            )
        )
    return out


def validate_resource(data: object) -> list[Finding]:
    """Every problem in one FHIR resource (a Bundle's entries included)."""
    if not isinstance(data, dict) or not isinstance(data.get("resourceType"), str):
        return [
            _error(
                "fhir-no-resource-type",
                "resourceType",
                "a FHIR resource is a JSON object with a resourceType",
                "FHIR JSON representation",
                "structure",
            )
        ]
    kind = data["resourceType"]
    found = _structure(kind, data) + _codes(data, kind)
    if kind == "Bundle":
        found += _bundle_rules(data)
        for prefix, inner in _contained(data):
            found += _codes(inner, prefix)
    if kind not in SAME_IN_R4 and not found:
        found.append(
            Finding(
                severity=Severity.INFORMATION,
                code="fhir-checked-as-r4b",
                location="resourceType",
                message=f"{kind} was checked against R4B, which may differ from R4 for this type",
                rule=_RULE,
                issue_type="informational",
            )
        )
    return bounded(found)
