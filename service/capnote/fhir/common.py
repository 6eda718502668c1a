"""Pieces every resource builder shares: stable ids, references, times and search tokens.

Resources are built as plain dicts (fhir.resources models cost ~100x more per request and
are kept for validation at the edges and in tests).
"""

from __future__ import annotations

import hashlib
import re
import uuid
from dataclasses import dataclass
from datetime import datetime
from functools import lru_cache
from typing import Any, Protocol
from urllib.parse import quote

from capnote.fhir.codes import CANONICAL, RESOURCE_KEY
from capnote.note import Identifier, Note
from capnote.policy.model import RecordPolicy

_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, CANONICAL)


_NAMESPACE_BYTES = _NAMESPACE.bytes
_VARIANT = "89ab" * 4  # the nibble with RFC 4122's variant bits set, by its old value


# The Procedure's role: its key is the note's key (capnote.notes.note_key).
PROCEDURE_ROLE = "procedure"


class KeyMaker:
    """Stable UUIDs for one note: the same note and role give the same UUID, every time, on
    every machine.

    uuid.uuid5 written out (RFC 4122 section 4.3: SHA-1 of namespace and name, version 5,
    RFC variant), without its UUID object. A Bundle needs about twenty of these, so the
    hash of the shared prefix (namespace, note identifier) is computed once and copied.
    """

    __slots__ = ("_prefix",)

    def __init__(self, note: Note) -> None:
        self._prefix = _prefix(note.note_id, "")

    @classmethod
    def of_record(cls, identifier: Identifier, kind: str) -> KeyMaker:
        """Keys for another kind of record (a review visit: kind "review"), named by its own
        identifier; the kind keeps them apart from a note's that shares the identifier (the
        empty kind is a note's own: its keys from its note identifier alone)."""
        made = cls.__new__(cls)
        made._prefix = _prefix(identifier, f"{kind}|" if kind else "")
        return made

    def key(self, role: str) -> str:
        """The UUID of this note's resource in the given role."""
        digest = self._prefix.copy()
        digest.update(role.encode())
        h = digest.hexdigest()
        # Version nibble 5; variant bits 10 (the nibble becomes 8, 9, a or b).
        return f"{h[:8]}-{h[8:12]}-5{h[13:16]}-{_VARIANT[int(h[16], 16)]}{h[17:20]}-{h[20:32]}"


def _prefix(identifier: Identifier, kind: str) -> Any:
    """The SHA-1 state after the namespace and the record's name (see KeyMaker)."""
    name = f"{kind}{identifier.system}|{identifier.value}|".encode()
    return hashlib.sha1(_NAMESPACE_BYTES + name, usedforsecurity=False)


def stable_uuid(note: Note, role: str) -> str:
    """The stable UUID of one role of a note (see KeyMaker)."""
    return KeyMaker(note).key(role)


def search_escape(value: str) -> str:
    """Escape FHIR search's special characters (R4 search, 'Escaping Search Parameters')."""
    for char in ("\\", ",", "$", "|"):
        value = value.replace(char, "\\" + char)
    return value


# Characters that neither FHIR search escaping nor percent-encoding (quote, safe="") changes.
_UNCHANGED = re.compile(r"[A-Za-z0-9_.~-]*")


def _search_part(text: str) -> str:
    """One part of a token search: FHIR-escaped, then percent-encoded."""
    if _UNCHANGED.fullmatch(text):  # most identifiers and every UUID: nothing to do
        return text
    return _encoded(text)


@lru_cache(maxsize=256)  # a sender's identifier system is the same on every note
def _encoded(text: str) -> str:
    return quote(search_escape(text), safe="")


def identifier_query(system: str, value: str) -> str:
    """An ``identifier=system|value`` search, as ifNoneExist takes it.

    Each part is FHIR-escaped, then percent-encoded: an identifier holding ``&``, ``#`` or
    ``+`` must not add search parameters of its own to the receiver's duplicate check.
    """
    return f"identifier={_search_part(system)}|{_search_part(value)}"


def fhir_identifier(identifier: Identifier) -> dict[str, Any]:
    """A FHIR Identifier from a note identifier."""
    return {"system": identifier.system, "value": identifier.value}


def when(moment: datetime) -> str:
    """A FHIR dateTime with its UTC offset (the note's own offset is kept)."""
    return moment.isoformat()


@dataclass(frozen=True, slots=True)
class Entry:
    """One resource on its way into the Bundle, with its stable key and its role in the note
    (the role names it in the read API: see capnote.fhir.ids)."""

    key: str
    resource: dict[str, Any]
    if_none_exist: str
    role: str

    @property
    def full_url(self) -> str:
        """The entry's urn:uuid, resolved by the receiving server."""
        return f"urn:uuid:{self.key}"

    @property
    def reference(self) -> dict[str, str]:
        """A reference to this entry from another in the same Bundle."""
        return {"reference": self.full_url}


# The ifNoneExist search of a resource key, but for the key itself: a UUID needs no escaping.
_KEY_QUERY = identifier_query(RESOURCE_KEY, "")


def key_query(key: str) -> str:
    """The ifNoneExist search that finds the resource with this project key."""
    return _KEY_QUERY + key


class Keyed(Protocol):
    """What keyed() needs of a record's context: its keys (a note's or a review's)."""

    @property
    def keys(self) -> KeyMaker: ...


def keyed(ctx: Keyed, role: str, kind: str) -> tuple[str, dict[str, Any]]:
    """A new resource of the record in this role: its key and the resource, begun with its
    type and its identifier (the project's resource key, which ifNoneExist searches), as
    FHIR JSON is usually read; the builder adds the rest."""
    key = ctx.keys.key(role)
    return key, {"resourceType": kind, "identifier": [{"system": RESOURCE_KEY, "value": key}]}


def keyed_entry(key: str, resource: dict[str, Any], role: str) -> Entry:
    """The Bundle entry of a resource begun with keyed()."""
    return Entry(key, resource, _KEY_QUERY + key, role)


@dataclass(frozen=True, slots=True)
class Emitted:
    """A Bundle as emitted, with each entry's role in entry order (roles are not part of the
    Bundle: the read API names resources by them, and an amendment carries them forward)."""

    bundle: dict[str, Any]
    roles: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Version:
    """Which version of a note is emitted, and what came before it."""

    number: int = 1
    voided: bool = False
    # An earlier version was signed: this one amends what the receiver already holds.
    amends_final: bool = False
    # What the version before emitted, to withdraw what this one no longer has.
    previous: Emitted | None = None
    # A signed, attended review visit (capnote.reviews) completed the session's review
    # request: a later version of the session keeps it completed, not owed again.
    reviewed: bool = False


# What the shipped policy's [record] table says (policy/default.toml), for callers without a
# policy at hand; tests/test_fhir_references.py checks the two agree.
DEFAULT_RECORD = RecordPolicy(
    region="england",
    references="identifier",
    source="capnote demo clinic (England): set to the site's region and to what its "
    "receiving record resolves",
)

# A FHIR id (R4 datatypes, id): a site number that is not one cannot name a literal reference.
_FHIR_ID = re.compile(r"[A-Za-z0-9\-.]{1,64}")


def reference_to(
    kind: str, identifier: Identifier, record: RecordPolicy, display: str | None = None
) -> dict[str, Any]:
    """A reference to a resource the receiver holds (Patient, Encounter, Practitioner), in
    the site's reference mode; the identifier is always kept, so a receiver that resolves
    nothing still knows whom it names.

    conditional: ``Patient?identifier=system|value``, which the receiver resolves inside the
    transaction and fails on no or several matches (FHIR R4 http.html, transaction,
    "Conditional References"). literal: ``[reference_base]/Patient/[value]``, for a record
    whose ids are the site's numbers; a number that is not a FHIR id stays identifier-only.
    """
    out: dict[str, Any] = {}
    if record.references == "conditional":
        out["reference"] = f"{kind}?{identifier_query(identifier.system, identifier.value)}"
    elif (
        record.references == "literal"
        and record.reference_base is not None
        and _FHIR_ID.fullmatch(identifier.value)
    ):
        out["reference"] = f"{record.reference_base.rstrip('/')}/{kind}/{identifier.value}"
    out["identifier"] = fhir_identifier(identifier)
    if display is not None:
        out["display"] = display
    return out


class VersionContext:
    """What every resource of one note version shares: references, version and state."""

    def __init__(
        self, note: Note, version: Version | None = None, record: RecordPolicy | None = None
    ) -> None:
        version = version or Version()
        self.record = record = record or DEFAULT_RECORD
        self.note = note
        self.keys = KeyMaker(note)
        self.version = version.number
        self.voided = version.voided
        self.reviewed = version.reviewed
        self.amended = version.amends_final and note.status == "final"
        self.subject = reference_to("Patient", note.patient, record)
        self.encounter: dict[str, Any] | None = (
            reference_to("Encounter", note.encounter, record) if note.encounter else None
        )
        self.clinician = reference_to(
            "Practitioner", note.performer.identifier, record, note.performer.name
        )
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
