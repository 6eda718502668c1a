"""Pieces every resource builder shares: stable ids, references, times and search tokens.

Resources are built as plain dicts (fhir.resources models cost ~100x more per request and
are kept for validation at the edges and in tests).
"""

from __future__ import annotations

import hashlib
import uuid
from dataclasses import dataclass
from datetime import datetime
from typing import Any
from urllib.parse import quote

from schemas.note import Identifier, Note
from service.fhir.codes import CANONICAL, RESOURCE_KEY

_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, CANONICAL)


_NAMESPACE_BYTES = _NAMESPACE.bytes


def stable_uuid(note: Note, role: str) -> str:
    """The same UUID for the same note and role, every time, on every machine.

    uuid.uuid5 written out (RFC 4122 section 4.3: SHA-1 of namespace and name, version 5,
    RFC variant), without its UUID object: a Bundle needs about twenty of these.
    """
    name = f"{note.note_id.system}|{note.note_id.value}|{role}".encode()
    raw = bytearray(hashlib.sha1(_NAMESPACE_BYTES + name, usedforsecurity=False).digest()[:16])
    raw[6] = (raw[6] & 0x0F) | 0x50
    raw[8] = (raw[8] & 0x3F) | 0x80
    h = raw.hex()
    return f"{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:]}"


def search_escape(value: str) -> str:
    """Escape FHIR search's special characters (R4 search, 'Escaping Search Parameters')."""
    for char in ("\\", ",", "$", "|"):
        value = value.replace(char, "\\" + char)
    return value


def identifier_query(system: str, value: str) -> str:
    """An ``identifier=system|value`` search, as ifNoneExist takes it.

    Each part is FHIR-escaped, then percent-encoded: an identifier holding ``&``, ``#`` or
    ``+`` must not add search parameters of its own to the receiver's duplicate check.
    """
    system_part = quote(search_escape(system), safe="")
    value_part = quote(search_escape(value), safe="")
    return f"identifier={system_part}|{value_part}"


def fhir_identifier(identifier: Identifier) -> dict[str, Any]:
    """A FHIR Identifier from a note identifier."""
    return {"system": identifier.system, "value": identifier.value}


def when(moment: datetime) -> str:
    """A FHIR dateTime with its UTC offset (the note's own offset is kept)."""
    return moment.isoformat()


@dataclass(frozen=True, slots=True)
class Entry:
    """One resource on its way into the Bundle, with its stable key."""

    key: str
    resource: dict[str, Any]
    if_none_exist: str

    @property
    def full_url(self) -> str:
        """The entry's urn:uuid, resolved by the receiving server."""
        return f"urn:uuid:{self.key}"

    @property
    def reference(self) -> dict[str, str]:
        """A reference to this entry from another in the same Bundle."""
        return {"reference": self.full_url}


def keyed(note: Note, role: str, resource: dict[str, Any]) -> Entry:
    """An entry whose identifier is the project's resource key (used by ifNoneExist)."""
    key = stable_uuid(note, role)
    resource["identifier"] = [{"system": RESOURCE_KEY, "value": key}]
    # Keep resourceType first and identifier second, as FHIR JSON is usually read.
    ordered = {"resourceType": resource.pop("resourceType"), **resource}
    return Entry(key, ordered, identifier_query(RESOURCE_KEY, key))


@dataclass(frozen=True, slots=True)
class Version:
    """Which version of a note is emitted, and what came before it."""

    number: int = 1
    voided: bool = False
    # An earlier version was signed: this one amends what the receiver already holds.
    amends_final: bool = False
    # The Bundle of the version before, to withdraw what this one no longer has.
    previous: dict[str, Any] | None = None


class Context:
    """What every resource of one note version shares: references, version and state."""

    def __init__(self, note: Note, version: Version | None = None) -> None:
        version = version or Version()
        self.note = note
        self.version = version.number
        self.voided = version.voided
        self.amended = version.amends_final and note.status == "final"
        self.subject: dict[str, Any] = {"identifier": fhir_identifier(note.patient)}
        self.encounter: dict[str, Any] | None = (
            {"identifier": fhir_identifier(note.encounter)} if note.encounter else None
        )
        self.clinician: dict[str, Any] = {
            "identifier": fhir_identifier(note.performer.identifier),
            "display": note.performer.name,
        }
        self.draft = note.status == "draft"

    def status(self, current: str, *, draft: str | None = None, amended: str | None = None) -> str:
        """A resource's status for this version: void wins, then draft, then amended."""
        if self.voided:
            return "entered-in-error"
        if self.draft and draft is not None:
            return draft
        if self.amended and amended is not None:
            return amended
        return current

    def with_encounter(self, resource: dict[str, Any], field: str = "encounter") -> None:
        """Add the encounter reference where the note has one."""
        if self.encounter is not None:
            resource[field] = self.encounter
