"""Who a record is: its identifier, and the note identifiers a batch has already met.

A batch is what an interface sends the service one request at a time, so a note identifier
met twice is what the service would meet twice: the same content is a resend (stored once),
other content the service's 409 Conflict.
"""

from __future__ import annotations

from array import array
from typing import Any

from capnote.batch.inputs import STDIN, Record, Source
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


_MASK = (1 << 64) - 1


def _digest(data: bytes | str | tuple[str, str]) -> int:
    """A 64-bit digest as an unsigned number (0 marks an empty slot, so never 0).

    Python's own hash (SipHash, keyed afresh in every process, so no input can be made to
    collide on purpose): the table lives in one process only, and blake2b cost three times
    as much per record. Chance collisions among a million notes have odds of about one in
    thirty million (the birthday bound, n^2 / 2^65)."""
    return (hash(data) & _MASK) or 1


def content_digest(note: Note) -> int:
    """A digest of the note as the service stores it (absent and null fields alike), so a
    resend with other spacing or key order is the same content, as it is to the service."""
    return _digest(note.model_dump_json(exclude_none=True))


def _where(source: Source, line: int | None) -> str:
    return source.shown if line is None else f"{source.shown}:{line}"


def _reread(source: Source, offset: int) -> Note | None:
    """The note at offset in source (a line, or the whole file), read again; None when it
    cannot be (the file has changed or gone)."""
    try:
        with source.path.open("rb") as stream:
            stream.seek(offset)
            raw = stream.readline() if source.streamed else stream.read()
        return Note.model_validate_json(raw.removeprefix(b"\xef\xbb\xbf"))
    except (OSError, ValueError):
        return None


_LINE_BITS = 40  # a place: the source's number above, the line (0: whole file) below
_CANONICAL = 1 << 63  # the content digest is of the stored form, not of the raw bytes


class SeenNotes:
    """The note identifiers of a batch so far, in an open-addressing table of four arrays
    of 64-bit numbers (identifier digest, content digest, where first met, its byte offset):
    32 bytes a slot, 50 to 100 a note, where a dict of tuples takes about 280. This is the one
    memory a batch spends per record.

    The content digest is of the raw record: the stored form (pydantic's dump, which costs
    half a parse) is computed only when an identifier comes again with other bytes, and the
    first record is then read again from its file. Standard input cannot be read again, so
    its notes are digested in their stored form at once.
    """

    def __init__(self) -> None:
        self._keys = array("Q", bytes(8 * 1024))
        self._contents = array("Q", bytes(8 * 1024))
        self._places = array("Q", bytes(8 * 1024))
        self._offsets = array("Q", bytes(8 * 1024))
        self._used = 0
        self._sources: list[Source] = []
        self._numbers: dict[Source, int] = {}
        self._last: Source | None = None
        self._last_number = 0
        self._unreadable = False

    def _slot(self, key: int) -> int:
        """Where key is, or the empty slot where it would go (linear probing)."""
        mask = len(self._keys) - 1
        slot = key & mask
        while self._keys[slot] not in (0, key):
            slot = (slot + 1) & mask
        return slot

    def _grow(self) -> None:
        old = (self._keys, self._contents, self._places, self._offsets)
        size = 2 * len(self._keys)
        self._keys, self._contents, self._places, self._offsets = (
            array("Q", bytes(8 * size)) for _ in range(4)
        )
        for key, content, place, offset in zip(*old, strict=True):
            if key:
                slot = self._slot(key)
                self._keys[slot], self._contents[slot] = key, content
                self._places[slot], self._offsets[slot] = place, offset

    def _place(self, source: Source, line: int | None) -> int:
        if source is not self._last:  # a batch meets its sources one after another
            number = self._numbers.get(source)
            if number is None:
                number = self._numbers[source] = len(self._sources)
                self._sources.append(source)
            self._last, self._last_number = source, number
            self._unreadable = source.path == STDIN  # no second reading of standard input
        return (self._last_number << _LINE_BITS) | (line or 0)

    def _first(self, place: int) -> tuple[Source, int | None]:
        line = place & ((1 << _LINE_BITS) - 1)
        return self._sources[(place & ~_CANONICAL) >> _LINE_BITS], line or None

    def _same(self, slot: int, note: Note, raw: bytes) -> bool:
        """Whether note has the content of the first one with its identifier."""
        if self._places[slot] & _CANONICAL:
            return self._contents[slot] == content_digest(note)
        if self._contents[slot] == _digest(raw):
            return True
        source, _line = self._first(self._places[slot])
        first = _reread(source, self._offsets[slot])
        return first is not None and content_digest(first) == content_digest(note)

    def meet(self, note: Note, raw: bytes, record: Record) -> Finding | None:
        """None the first time an identifier is met; after that a finding: an error when the
        content differs from the first note's, information when it is the same."""
        key = _digest((note.note_id.system, note.note_id.value))
        keys = self._keys
        mask = len(keys) - 1
        slot = key & mask
        while keys[slot] not in (0, key):  # the probing of _slot, inline: once per record
            slot = (slot + 1) & mask
        if keys[slot] == 0:
            place = self._place(record.source, record.line)
            if self._unreadable:
                digest, place = content_digest(note), place | _CANONICAL
            else:
                digest = _digest(raw)
            keys[slot], self._contents[slot] = key, digest
            self._places[slot], self._offsets[slot] = place, record.offset
            self._used += 1
            if self._used * 5 > mask * 3:  # past a load of 0.6
                self._grow()
            return None
        where = _where(*self._first(self._places[slot]))
        if not self._same(slot, note, raw):
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
