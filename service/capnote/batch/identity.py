"""Who a record is: its identifier, and the note identifiers a batch has already met.

A batch is what an interface sends the service one request at a time, so a note identifier
met twice is what the service would meet twice: the same content is a resend (stored once),
other content the service's 409 Conflict.
"""

from __future__ import annotations

import hashlib
from typing import Any

from capnote.batch.inputs import Source
from capnote.findings import Finding, Severity
from capnote.note import Note

DUPLICATE = "duplicate-note-id"
RESENT = "repeated-note"
_RULE = "a note identifier names one note (the service answers 409 to other content under it)"


def note_identifier(note: Note) -> str:
    """A note's identifier as FHIR writes a token: system|value."""
    return f"{note.note_id.system}|{note.note_id.value}"


def raw_identifier(data: Any) -> str | None:
    """The identifier of a record that did not parse as a note: its note_id if it has a
    readable one, a resource's resourceType/id, else None."""
    if not isinstance(data, dict):
        return None
    kind = data.get("resourceType")
    if isinstance(kind, str):
        rid = data.get("id")
        return f"{kind}/{rid}" if isinstance(rid, str) and rid else kind
    ident = data.get("note_id")
    if isinstance(ident, dict):
        system, value = ident.get("system"), ident.get("value")
        if isinstance(system, str) and isinstance(value, str):
            return f"{system}|{value}"
    return None


def content_digest(note: Note) -> bytes:
    """A digest of the note as the service stores it (absent and null fields alike), so a
    resend with other spacing or key order is the same content, as it is to the service."""
    stored = note.model_dump_json(exclude_none=True)
    return hashlib.blake2b(stored.encode(), digest_size=16).digest()


def _where(source: Source, line: int | None) -> str:
    return source.shown if line is None else f"{source.shown}:{line}"


class SeenNotes:
    """The note identifiers of a batch so far: one small entry per note (two 16-byte
    digests and where it was first met), the only memory a batch spends per record."""

    def __init__(self) -> None:
        self._seen: dict[bytes, tuple[bytes, Source, int | None]] = {}

    def meet(self, note: Note, source: Source, line: int | None) -> Finding | None:
        """None the first time an identifier is met; after that a finding: an error when the
        content differs from the first note's, information when it is the same."""
        key = hashlib.blake2b(note_identifier(note).encode(), digest_size=16).digest()
        digest = content_digest(note)
        first = self._seen.get(key)
        if first is None:
            self._seen[key] = (digest, source, line)
            return None
        first_digest, first_source, first_line = first
        where = _where(first_source, first_line)
        if first_digest != digest:
            return Finding(
                severity=Severity.ERROR,
                code=DUPLICATE,
                location="note_id",
                message=f"the note identifier was already used at {where} for other content; "
                "the service would refuse this note (409 Conflict)",
                rule=_RULE,
                allowed="one content per note identifier; a change is an amendment",
                issue_type="duplicate",
            )
        return Finding(
            severity=Severity.INFORMATION,
            code=RESENT,
            location="note_id",
            message=f"the same note as at {where}; the service would store it once",
            rule=_RULE,
            issue_type="informational",
        )
