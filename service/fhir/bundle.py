"""One note's FHIR R4 transaction Bundle: safe to send twice.

Every fullUrl is a urn:uuid derived from the note identifier and the resource's role, and
every entry's request carries ifNoneExist on its identifier, so a receiver that honours
conditional create makes nothing new when the same note arrives again.
"""

from __future__ import annotations

from typing import Any

from schemas.note import Note
from service.derive import Derived
from service.errors import EmissionError
from service.fhir.bindings import binding_problems
from service.fhir.codes import RESOURCE_KEY
from service.fhir.common import Context, Entry, Version, identifier_query, stable_uuid
from service.fhir.observations import observations
from service.fhir.procedure import procedure
from service.fhir.requests import administrations, medication_request, service_request
from service.schedule import DueItem


def entries(
    note: Note, derived: Derived, due: list[DueItem], version: Version | None = None
) -> list[Entry]:
    """Every resource for the note version, the Procedure first."""
    ctx = Context(note, version)
    proc = procedure(ctx, derived, due)
    out = [proc, *observations(ctx, proc, derived)]
    out += [service_request(ctx, proc, item) for item in due]
    for i, drop in enumerate(note.plan.prophylaxis):
        out += administrations(ctx, proc, drop, i)
    out += [medication_request(ctx, proc, drop, i) for i, drop in enumerate(note.plan.take_home)]
    return out


def _request(entry: Entry, version: int) -> dict[str, str]:
    """Version 1 creates if absent; later versions update what the receiver holds, found by
    the same identifier search (conditional update), so every resend stays harmless."""
    kind = entry.resource["resourceType"]
    if version == 1:
        return {"method": "POST", "url": kind, "ifNoneExist": entry.if_none_exist}
    return {"method": "PUT", "url": f"{kind}?{entry.if_none_exist}"}


# What a resource that an amendment no longer has becomes at the receiver.
_WITHDRAWN = {
    "ServiceRequest": "revoked",
    "MedicationRequest": "cancelled",
    "Observation": "entered-in-error",
    "MedicationAdministration": "entered-in-error",
    "Procedure": "entered-in-error",
}


def withdrawn(previous: dict[str, Any], kept: set[str]) -> list[Entry]:
    """The previous version's resources this version dropped, each with a status that says
    so: an amendment that removes a next-day check must not leave it active elsewhere."""
    out = []
    for entry in previous.get("entry", []):
        key = entry["fullUrl"].removeprefix("urn:uuid:")
        if key in kept:
            continue
        resource = dict(entry["resource"])
        resource["status"] = _WITHDRAWN[resource["resourceType"]]
        out.append(Entry(key, resource, identifier_query(RESOURCE_KEY, key)))
    return out


def bundle(
    note: Note, derived: Derived, due: list[DueItem], version: Version | None = None
) -> dict[str, Any]:
    """The transaction Bundle; raises EmissionError rather than emit a bad code."""
    # No id or meta here: a receiver assigns its own, and a conditional update must not
    # carry an id that may differ from the matched resource's. The read API adds both.
    version = version or Version()
    items = entries(note, derived, due, version)
    if version.previous is not None:
        items += withdrawn(version.previous, {e.key for e in items})
    result: dict[str, Any] = {
        "resourceType": "Bundle",
        "identifier": {"system": RESOURCE_KEY, "value": stable_uuid(note, "bundle")},
        "type": "transaction",
        "entry": [
            {
                "fullUrl": e.full_url,
                "resource": e.resource,
                "request": _request(e, version.number),
            }
            for e in items
        ],
    }
    problems = [p for e in items for p in binding_problems(e.resource)]
    problems += binding_problems(result)
    if problems:
        where = ", ".join(f"{loc} = {value!r} (ValueSet {vs})" for loc, value, vs in problems)
        raise EmissionError(f"required binding broken in emitted FHIR: {where}")
    return result
