"""The note identifiers a batch has met: found again after the table has grown many times,
told apart by content as the service tells a resend from a change."""

from __future__ import annotations

import json
from pathlib import Path

from capnote.batch.identity import DUPLICATE, RESENT, SeenNotes, raw_identifier
from capnote.batch.inputs import Source
from capnote.note import Note
from tests.batch_helpers import note


def _note(i: int, kind: str = "clean") -> Note:
    return Note.model_validate_json(json.dumps(note(i, kind)))


def test_every_identifier_is_found_again_after_the_table_grows() -> None:
    seen = SeenNotes()
    first, second = Source(Path("a.ndjson"), True), Source(Path("b.json"), False)
    notes = [_note(i) for i in range(1, 3001)]  # 3,000: the table doubles three times
    assert all(seen.meet(n, first, i) is None for i, n in enumerate(notes, start=1))
    for i in (1, 1234, 3000):
        again = seen.meet(notes[i - 1], second, None)
        assert again is not None
        assert again.code == RESENT
        assert again.severity.value == "information"
        assert f"a.ndjson:{i};" in again.message
    changed = seen.meet(_note(77, "warning"), second, None)
    assert changed is not None
    assert changed.code == DUPLICATE
    assert changed.blocking
    assert "a.ndjson:77 for other content" in changed.message
    assert "409" in changed.message


def test_a_whole_file_is_named_without_a_line() -> None:
    seen = SeenNotes()
    assert seen.meet(_note(1), Source(Path("one.json"), False), None) is None
    again = seen.meet(_note(1), Source(Path("dump.ndjson"), True), 4)
    assert again is not None
    assert "the same note as at one.json;" in again.message


def test_a_record_names_itself_even_when_it_does_not_parse() -> None:
    assert raw_identifier({"resourceType": "Procedure", "id": "p-1"}) == "Procedure/p-1"
    assert raw_identifier({"resourceType": "Bundle"}) == "Bundle"
    assert raw_identifier({"note_id": {"system": "urn:x", "value": "7"}, "eye": 3}) == "urn:x|7"
    assert raw_identifier({"note_id": "7"}) is None
    assert raw_identifier([1, 2]) is None
