"""Who a record is: its identifier, and the note identifiers a batch has already met.

A batch is what an interface sends the service one request at a time, so a note identifier
met twice is what the service would meet twice: the same content is a resend (stored once),
other content the service's 409 Conflict.
"""

from __future__ import annotations

import hashlib
from array import array
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


def _digest(text: str) -> int:
    """A 64-bit digest as a number: collisions among a million notes have odds of about
    one in thirty million (the birthday bound, n^2 / 2^65)."""
    return int.from_bytes(hashlib.blake2b(text.encode(), digest_size=8).digest()) or 1


def content_digest(note: Note) -> int:
    """A digest of the note as the service stores it (absent and null fields alike), so a
    resend with other spacing or key order is the same content, as it is to the service."""
    return _digest(note.model_dump_json(exclude_none=True))


def _where(source: Source, line: int | None) -> str:
    return source.shown if line is None else f"{source.shown}:{line}"


_LINE_BITS = 40  # a slot's place: the source's number above, the line (0: whole file) below


class SeenNotes:
    """The note identifiers of a batch so far, in an open-addressing table of three arrays
    of 64-bit numbers (identifier digest, content digest, where first met): 24 bytes a
    slot, about 40 a note, where a dict of tuples takes about 280. This is the one memory
    a batch spends per record."""

    def __init__(self) -> None:
        self._keys = array("Q", bytes(8 * 1024))
        self._contents = array("Q", bytes(8 * 1024))
        self._places = array("Q", bytes(8 * 1024))
        self._used = 0
        self._sources: list[Source] = []
        self._numbers: dict[Source, int] = {}

    def _slot(self, key: int) -> int:
        """Where key is, or the empty slot where it would go (linear probing)."""
        mask = len(self._keys) - 1
        slot = key & mask
        while self._keys[slot] not in (0, key):
            slot = (slot + 1) & mask
        return slot

    def _grow(self) -> None:
        keys, contents, places = self._keys, self._contents, self._places
        size = 2 * len(keys)
        self._keys = array("Q", bytes(8 * size))
        self._contents = array("Q", bytes(8 * size))
        self._places = array("Q", bytes(8 * size))
        for key, content, place in zip(keys, contents, places, strict=True):
            if key:
                slot = self._slot(key)
                self._keys[slot], self._contents[slot], self._places[slot] = key, content, place

    def _place(self, source: Source, line: int | None) -> int:
        number = self._numbers.get(source)
        if number is None:
            number = self._numbers[source] = len(self._sources)
            self._sources.append(source)
        return (number << _LINE_BITS) | (line or 0)

    def _first(self, place: int) -> str:
        line = place & ((1 << _LINE_BITS) - 1)
        return _where(self._sources[place >> _LINE_BITS], line or None)

    def meet(self, note: Note, source: Source, line: int | None) -> Finding | None:
        """None the first time an identifier is met; after that a finding: an error when the
        content differs from the first note's, information when it is the same."""
        key = _digest(note_identifier(note))
        digest = content_digest(note)
        slot = self._slot(key)
        if self._keys[slot] == 0:
            self._keys[slot], self._contents[slot] = key, digest
            self._places[slot] = self._place(source, line)
            self._used += 1
            if self._used * 5 > len(self._keys) * 3:  # past a load of 0.6
                self._grow()
            return None
        where = self._first(self._places[slot])
        if self._contents[slot] != digest:
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
