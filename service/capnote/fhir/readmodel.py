"""How the FHIR read API names and serves the resources of stored Bundles.

A resource's id on the read API is its note's id followed by its role in the note
(``<note id>-iop-before``, ``<note id>-due-review``); the Procedure, which is the note, has the
note's id itself. An id therefore says where the resource is kept (in its note's stored
Bundles), so reading one needs no index of its own, and it stays the same across the
note's versions, as a FHIR logical id does. Each resource's stable UUID (its fullUrl and
identifier in the emitted Bundle) is unchanged and still found in its identifier.

Resources are served with id, meta.versionId (the note version), meta.lastUpdated and their
references within the Bundle (urn:uuid fullUrls) turned into relative references, which a
reader can follow on this API.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from capnote.fhir.common import PROCEDURE_ROLE

# The resource types the read API serves; every one of them is searchable.
READABLE = (
    "Procedure",
    "Observation",
    "ServiceRequest",
    "MedicationRequest",
    "MedicationAdministration",
    "Provenance",
)
# Each version's Provenance is read (by the id its Bundle entry gives), not searched.
SEARCHABLE = tuple(kind for kind in READABLE if kind != "Provenance")
_UUID = r"[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}"
# FHIR ids are [A-Za-z0-9-.]{1,64}: 36 for the note id, one dash, 27 for the role.
_ID = re.compile(rf"({_UUID})(?:-([a-z0-9][a-z0-9-]{{0,26}}))?")
ROLE_MAX = 27


def resource_id(note_key: str, role: str) -> str:
    """The read API's id of the resource in this role of the note."""
    return note_key if role == PROCEDURE_ROLE else f"{note_key}-{role}"


def parse_id(text: str) -> tuple[str, str] | None:
    """(note id, role) of a read API id; None for anything that cannot name a resource."""
    match = _ID.fullmatch(text)
    if match is None:
        return None
    return match[1], match[2] or PROCEDURE_ROLE


def read_references(note_key: str, entries: tuple[tuple[str, str], ...]) -> tuple[str, ...]:
    """Where each (resource type, role) of a note is read: ``Observation/<id>``."""
    return tuple(f"{kind}/{resource_id(note_key, role)}" for kind, role in entries)


# A time for the resources that carry none, so that every index row sorts (keyset paging
# needs a total order, and the two engines order NULLs differently).
NO_DATE = datetime(1, 1, 1, tzinfo=UTC)


@dataclass(frozen=True, slots=True)
class Searchable:
    """What the searches filter on, for one resource of a version: its status, the range
    of its search date (start and end; equal for a moment, None when it has none) and its
    tokens as (parameter, system, code): codings of code and identifiers."""

    role: str
    resource_type: str
    status: str
    date: datetime | None
    date_end: datetime | None = None
    tokens: tuple[tuple[str, str, str], ...] = ()

    @property
    def sort_at(self) -> datetime:
        """The time results are ordered by (the start of the date range)."""
        return NO_DATE if self.date is None else self.date


def searchables(bundle: dict[str, Any], roles: tuple[str, ...]) -> list[Searchable]:
    """The searchable resources of a Bundle, with the values their searches filter on."""
    out = []
    for entry, role in zip(bundle["entry"], roles, strict=True):
        resource = entry["resource"]
        kind = resource["resourceType"]
        if kind in SEARCHABLE:
            start, end = search_range(resource)
            out.append(
                Searchable(role, kind, resource.get("status", ""), start, end, _tokens(resource))
            )
    return out


# Where each type keeps the date its date search parameter looks at, and its code.
_DATE_ELEMENT = {
    "Procedure": "performed",
    "Observation": "effective",
    "ServiceRequest": "occurrence",
    "MedicationAdministration": "effective",
    "MedicationRequest": "authoredOn",
}
_CODE_ELEMENT = {
    "Procedure": "code",
    "Observation": "code",
    "ServiceRequest": "code",
    "MedicationAdministration": "medicationCodeableConcept",
    "MedicationRequest": "medicationCodeableConcept",
}


def _tokens(resource: dict[str, Any]) -> tuple[tuple[str, str, str], ...]:
    found: list[tuple[str, str, str]] = []
    for ident in resource.get("identifier") or ():
        if ident.get("value"):
            found.append(("identifier", ident.get("system", ""), ident["value"]))
    concept = resource.get(_CODE_ELEMENT[resource["resourceType"]]) or {}
    for coding in concept.get("coding") or ():
        if coding.get("code"):
            found.append(("code", coding.get("system", ""), coding["code"]))
    return tuple(dict.fromkeys(found))  # once each: they are part of a primary key


def search_range(resource: dict[str, Any]) -> tuple[datetime | None, datetime | None]:
    """The range of time a resource's date search parameter looks at (FHIR R4 search,
    2.1.1.5.9: a date is the range its precision implies; a Period from start to end)."""
    element = _DATE_ELEMENT[resource["resourceType"]]
    start: str | None = None
    end: str | None = None
    if element == "authoredOn":
        start = end = resource.get("authoredOn")
    elif f"{element}DateTime" in resource:
        start = end = resource[f"{element}DateTime"]
    elif f"{element}Period" in resource:
        period = resource[f"{element}Period"]
        start, end = period.get("start"), period.get("end") or period.get("start")
    elif f"{element}Timing" in resource:
        events = resource[f"{element}Timing"].get("event") or [None]
        start = end = events[0]
    if not start or not end:
        return None, None
    return _moment(start, last=False), _moment(end, last=True)


def _moment(text: str, *, last: bool) -> datetime:
    """A FHIR date or dateTime as a UTC moment: the first (or last) moment of a whole day."""
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:  # a whole-day item: that day (UTC), as the date searches read one
        moment = moment.replace(tzinfo=UTC)
        if last and "T" not in text:
            moment += timedelta(days=1) - timedelta(microseconds=1)
    return moment.astimezone(UTC)


@dataclass(frozen=True, slots=True)
class StoredBundle:
    """One stored version's Bundle, ready to serve resources from."""

    note_key: str
    version: int
    recorded_at: datetime
    bundle: dict[str, Any]
    roles: tuple[str, ...]

    def served(self, role: str, kind: str) -> dict[str, Any] | None:
        """The resource in this role as the read API serves it, or None when this version
        has no resource of that type in that role."""
        try:
            index = self.roles.index(role)
        except ValueError:
            return None
        resource = self.bundle["entry"][index]["resource"]
        if resource["resourceType"] != kind:
            return None
        refs = self._references()
        served: dict[str, Any] = {
            "resourceType": kind,
            "id": resource_id(self.note_key, role),
            "meta": {
                "versionId": str(self.version),
                "lastUpdated": self.recorded_at.isoformat(),
            },
        }
        for name, value in resource.items():
            if name == "meta":  # the emitted profile, beside the version the read API adds
                served["meta"] = {**value, **served["meta"]}
            elif name not in ("resourceType", "id"):  # the read API names it
                served[name] = _resolved(value, refs)
        return served

    def _references(self) -> dict[str, str]:
        """Each entry's fullUrl, and the relative reference that replaces it when served."""
        return {
            entry["fullUrl"]: f"{entry['resource']['resourceType']}/"
            + resource_id(self.note_key, role)
            for entry, role in zip(self.bundle["entry"], self.roles, strict=True)
        }


def _resolved(node: Any, refs: dict[str, str]) -> Any:
    """A copy of node with every Reference to another entry of the Bundle made relative."""
    if isinstance(node, dict):
        out = {key: _resolved(value, refs) for key, value in node.items()}
        target = out.get("reference")
        if isinstance(target, str) and target in refs:
            out["reference"] = refs[target]
        return out
    if isinstance(node, list):
        return [_resolved(value, refs) for value in node]
    return node
