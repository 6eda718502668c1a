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
from datetime import UTC, datetime
from typing import Any

from capnote.fhir.common import PROCEDURE_ROLE

# The resource types the read API serves, and those its searches cover.
READABLE = (
    "Procedure",
    "Observation",
    "ServiceRequest",
    "MedicationRequest",
    "MedicationAdministration",
    "Provenance",
)
SEARCHABLE = ("Procedure", "ServiceRequest")
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


@dataclass(frozen=True, slots=True)
class Searchable:
    """What the searches filter on, for one searchable resource of a version."""

    role: str
    resource_type: str
    status: str
    date: datetime | None


def searchables(bundle: dict[str, Any], roles: tuple[str, ...]) -> list[Searchable]:
    """The searchable resources of a Bundle, with the values their searches filter on."""
    out = []
    for entry, role in zip(bundle["entry"], roles, strict=True):
        resource = entry["resource"]
        kind = resource["resourceType"]
        if kind in SEARCHABLE:
            out.append(Searchable(role, kind, resource.get("status", ""), search_date(resource)))
    return out


def search_date(resource: dict[str, Any]) -> datetime | None:
    """The moment the 'date' (Procedure) or 'occurrence' (ServiceRequest) search looks at."""
    text: str | None = None
    if resource["resourceType"] == "Procedure":
        text = resource.get("performedPeriod", {}).get("start")
    elif resource["resourceType"] == "ServiceRequest":
        events = resource.get("occurrenceTiming", {}).get("event") or [None]
        text = events[0]
    if not text:
        return None
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:  # a whole-day item: its date, at the start of the day (UTC)
        moment = moment.replace(tzinfo=UTC)
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
            if name not in ("resourceType", "id"):  # the read API names it
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
