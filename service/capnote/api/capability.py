"""The CapabilityStatement: exactly what /fhir supports, no more."""

from __future__ import annotations

from typing import Any

from capnote import __version__

_RELEASED = "2026-12-01"
_VALIDATE = "http://hl7.org/fhir/OperationDefinition/Resource-validate"


def _search(name: str, kind: str, doc: str) -> dict[str, str]:
    return {"name": name, "type": kind, "documentation": doc}


def _resource(kind: str, search: list[dict[str, str]]) -> dict[str, Any]:
    out: dict[str, Any] = {
        "type": kind,
        "interaction": [{"code": "read"}, {"code": "vread"}, {"code": "history-instance"}]
        + ([{"code": "search-type"}] if search else []),
        "versioning": "versioned",
        "readHistory": True,
        "operation": [{"name": "validate", "definition": _VALIDATE}],
    }
    if search:
        out["searchParam"] = search
    return out


def capability_statement(base_url: str) -> dict[str, Any]:
    """The statement for this server at base_url."""
    patient = _search(
        "patient",
        "reference",
        "only with the :identifier modifier: patient:identifier=system|value",
    )
    return {
        "resourceType": "CapabilityStatement",
        "status": "active",
        "date": _RELEASED,
        "publisher": "capnote",
        "kind": "instance",
        "software": {"name": "capnote", "version": __version__},
        "implementation": {
            "description": "capnote read API for Nd:YAG capsulotomy records",
            "url": base_url,
        },
        "fhirVersion": "4.0.1",
        "format": ["application/fhir+json"],
        "rest": [
            {
                "mode": "server",
                "documentation": "Read-only FHIR API over the notes capnote stores; records are "
                "written through POST /notes. Bearer token required except for /fhir/metadata.",
                "security": {
                    "description": "Bearer tokens issued with `capnote token new`; roles "
                    "submitter, clinician, analyst and auditor may read."
                },
                "resource": [
                    _resource(
                        "Procedure",
                        [
                            patient,
                            _search("date", "date", "performed start; prefixes eq ge gt le lt"),
                        ],
                    ),
                    _resource("Observation", []),
                    _resource(
                        "ServiceRequest",
                        [
                            patient,
                            _search("status", "token", "request status, e.g. active"),
                            _search("occurrence", "date", "target time; prefixes eq ge gt le lt"),
                        ],
                    ),
                    _resource("MedicationRequest", []),
                    _resource("MedicationAdministration", []),
                ],
                "operation": [{"name": "validate", "definition": _VALIDATE}],
            }
        ],
    }
