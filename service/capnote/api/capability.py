"""The CapabilityStatement: exactly what /fhir supports, no more."""

from __future__ import annotations

from functools import lru_cache
from typing import Any

from capnote import __version__
from capnote.api.audit import SUPPORTED as AUDIT_PARAMS
from capnote.fhir.profiles import structure_definitions
from capnote.fhir.readmodel import SEARCHABLE
from capnote.fhir.search import DATE_PARAM, MAX_COUNT, filter_params

_RELEASED = "2026-12-01"
_VALIDATE = "http://hl7.org/fhir/OperationDefinition/Resource-validate"
# $validate of a Bundle works (POST /fhir/Bundle/$validate); nothing else of Bundle is served.
_BUNDLE: dict[str, Any] = {
    "type": "Bundle",
    "operation": [{"name": "validate", "definition": _VALIDATE}],
}


_PARAMS: dict[str, tuple[str, str]] = {
    "_id": ("token", "the resource id"),
    "_lastUpdated": ("date", "when the version was recorded; every date prefix"),
    "identifier": ("token", "system|value of an identifier of the resource"),
    "patient": (
        "reference",
        "Patient/[id] or [id]: the patient whose identifier in the site's Patient id system "
        "(CAPNOTE_PATIENT_ID_SYSTEM) is id; refused while that is unset",
    ),
    "patient:identifier": ("reference", "system|value of the patient's identifier"),
    "subject": ("reference", "as patient (the subject is always the patient)"),
    "subject:identifier": ("reference", "as patient:identifier"),
    "status": ("token", "the status code; also status:not="),
    "code": ("token", "code, system|code, |code or system| of a coding of the code"),
    "eye": ("token", "right or left: the eye of the session (capnote's own parameter)"),
}
_DATES = {
    "Procedure": "performed (start to end)",
    "Observation": "effective time",
    "ServiceRequest": "the target time (a whole day for a review)",
    "MedicationAdministration": "effective time",
    "MedicationRequest": "when it was authored",
}
_SHAPING = (
    "Every parameter listed is applied; any other is refused with 400 (Prefer: "
    "handling=lenient ignores it, and the self link leaves it out). Comma ORs values, a "
    "repeated parameter ANDs; \\, \\| \\$ escape. Dates take eq ne gt lt ge le sa eb ap "
    "and partial dates (2026, 2026-11); a date without a zone is UTC. _count (0 to "
    f"{MAX_COUNT}, larger is clamped; 0 gives the count only), _summary=count, _total "
    "(none|estimate|accurate), _sort on the date parameter (- for newest first). Pages "
    "follow the next link (keyset: stable while notes are written). POST [type]/_search "
    "takes the parameters as application/x-www-form-urlencoded; its links leave out "
    "patient, subject and identifier, which the client posts again."
)


def _search(name: str, kind: str) -> dict[str, str]:
    if name == DATE_PARAM[kind]:
        return {"name": name, "type": "date", "documentation": _DATES[kind] + "; every prefix"}
    param_type, doc = _PARAMS[name if name in _PARAMS else name.partition(":")[0]]
    return {"name": name, "type": param_type, "documentation": doc}


@lru_cache(maxsize=1)
def _profiles_by_type() -> dict[str, tuple[str, ...]]:
    """capnote's published profiles per type (schemas/fhir-package), built once: the
    package never changes while the server runs."""
    found: dict[str, list[str]] = {}
    for sd in structure_definitions():
        found.setdefault(sd["type"], []).append(sd["url"])
    return {kind: tuple(urls) for kind, urls in found.items()}


# Each version's Provenance (its author, its attester, why), read by the id its Bundle gives.
_PROVENANCE: dict[str, Any] = {
    "type": "Provenance",
    "interaction": [{"code": "read"}, {"code": "vread"}],
    "documentation": "One per stored note version: <note id>-provenance-<version>.",
}
_AUDIT_DOC = {
    "date": ("date", "when it was recorded; every prefix but ne"),
    "agent": ("reference", "the id of the token used (capnote token list)"),
    "agent-name": ("string", "the person or client the token belongs to; starts with, any case"),
    "entity": ("reference", "Procedure/<note id>: what was read, searched or changed"),
    "outcome": ("token", "0 success, 4 refused, 8 failed on a server's side"),
}
# The audit trail, for the auditor role only.
_AUDIT_EVENT: dict[str, Any] = {
    "type": "AuditEvent",
    "interaction": [
        {"code": "read"},
        {
            "code": "search-type",
            "documentation": "Auditors only; newest first; _count (up to 500) and _page; any "
            "other parameter is refused with 400.",
        },
    ],
    "searchParam": [
        {"name": name, "type": t, "documentation": doc}
        for name, (t, doc) in _AUDIT_DOC.items()
        if name in AUDIT_PARAMS
    ],
}
# capnote's FHIR package (schemas/fhir-package), served without a token.
_CONFORMANCE = [
    {
        "type": kind,
        "interaction": [{"code": "read"}, {"code": "search-type"}],
        "searchParam": [
            {"name": "url", "type": "uri", "documentation": "the canonical URL"},
            {"name": "_id", "type": "token", "documentation": "the resource id"},
        ],
    }
    for kind in ("StructureDefinition", "CodeSystem", "ValueSet")
]


def _resource(kind: str) -> dict[str, Any]:
    params = [n for n in filter_params(kind) if n != "status:not"]
    urls = _profiles_by_type().get(kind, ())
    profiles = {"supportedProfile": list(urls)} if urls else {}
    return {
        "type": kind,
        **profiles,
        "interaction": [
            {"code": "read"},
            {"code": "vread"},
            {"code": "history-instance"},
            {"code": "search-type", "documentation": _SHAPING},
        ],
        "versioning": "versioned",
        "readHistory": True,
        "searchParam": [_search(name, kind) for name in params],
        "operation": [{"name": "validate", "definition": _VALIDATE}],
    }


def capability_statement(base_url: str) -> dict[str, Any]:
    """The statement for this server at base_url."""
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
        # JSON only: _format=xml or Accept: application/fhir+xml answers 406.
        "format": ["application/fhir+json", "json"],
        "rest": [
            {
                "mode": "server",
                "documentation": "Read-only FHIR API over the notes capnote stores; records are "
                "written through POST /notes. Bearer token required except for /fhir/metadata. "
                "JSON only: _format=xml or Accept: application/fhir+xml answers 406. HEAD is "
                "answered as GET without a body; reads carry ETag and Last-Modified.",
                "security": {
                    "description": "Bearer tokens issued with `capnote token new`; roles "
                    "submitter, clinician, analyst and auditor may read."
                },
                "resource": [
                    *(_resource(kind) for kind in SEARCHABLE),
                    _PROVENANCE,
                    _AUDIT_EVENT,
                    *_CONFORMANCE,
                    _BUNDLE,
                ],
                # POST /fhir/$validate: a resource of any type.
                "operation": [{"name": "validate", "definition": _VALIDATE}],
            }
        ],
    }
