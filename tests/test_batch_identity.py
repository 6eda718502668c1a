"""The note identifiers a batch has met: found again after the table has grown many times,
told apart by content as the service tells a resend from a change (the same content with
other spacing or key order is a resend), from a file and from standard input alike."""

from __future__ import annotations

import io
import json
from pathlib import Path

from capnote.batch.identity import DUPLICATE, RESENT, SeenNotes, raw_identifier
from capnote.batch.inputs import STDIN, Record, Source, records
from capnote.note import Note
from tests.batch_helpers import note


def _meet(seen: SeenNotes, record: Record) -> str | None:
    assert record.data is not None
    again = seen.meet(Note.model_validate_json(record.data), record.data, record)
    return None if again is None else f"{again.code} {again.severity.value}: {again.message}"


def test_every_identifier_is_found_again_after_the_table_grows(tmp_path: Path) -> None:
    dump = tmp_path / "a.ndjson"
    dump.write_text("".join(json.dumps(note(i, "clean")) + "\n" for i in range(1, 3001)))
    seen = SeenNotes()
    first = list(records([Source(dump, True)]))  # 3,000: the table doubles three times
    assert all(_meet(seen, r) is None for r in first)
    for i in (1, 1234, 3000):
        again = _meet(seen, first[i - 1])
        assert again is not None
        assert again.startswith(f"{RESENT} information: the same note as at {dump}:{i};")
    changed = tmp_path / "b.json"
    changed.write_text(json.dumps(note(77, "warning")))
    (record,) = records([Source(changed, False)])
    again = _meet(seen, record)
    assert again is not None
    assert again.startswith(f"{DUPLICATE} error: the note identifier was already used at {dump}:77")
    assert "409" in again


def test_other_spacing_and_key_order_are_the_same_content(tmp_path: Path) -> None:
    # The service compares the stored form (absent and null alike), not the bytes sent.
    first = note(1, "clean")
    first["assistant"] = None  # null here, absent below: the same to the service
    again = dict(reversed(list(note(1, "clean").items())))
    dump = tmp_path / "dump.ndjson"
    dump.write_bytes(
        b"\xef\xbb\xbf"
        + json.dumps(first).encode()
        + b"\n\n"
        + json.dumps(again, indent=2).replace("\n", "").encode()
        + b"\n"
    )
    seen = SeenNotes()
    one, two = records([Source(dump, True)])
    assert _meet(seen, one) is None
    said = _meet(seen, two)
    assert said is not None
    assert said.startswith(f"{RESENT} information: the same note as at {dump}:1;")


def test_standard_input_is_compared_in_the_stored_form() -> None:
    # Standard input cannot be read again: its notes are digested as stored at once.
    first = note(5, "clean")
    again = dict(reversed(list(first.items())))
    other = note(5, "warning")
    text = "".join(json.dumps(x) + "\n" for x in (first, again, other)).encode()
    seen = SeenNotes()
    one, two, three = records([Source(STDIN, True)], io.BytesIO(text))
    assert _meet(seen, one) is None
    assert (_meet(seen, two) or "").startswith(
        f"{RESENT} information: the same note as at <stdin>:1;"
    )
    assert (_meet(seen, three) or "").startswith(f"{DUPLICATE} error:")


def test_a_record_names_itself_even_when_it_does_not_parse() -> None:
    assert raw_identifier({"resourceType": "Procedure", "id": "p-1"}) == "Procedure/p-1"
    assert raw_identifier({"resourceType": "Bundle"}) == "Bundle"
    assert raw_identifier({"note_id": {"system": "urn:x", "value": "7"}, "eye": 3}) == "urn:x|7"
    assert raw_identifier({"note_id": "7"}) is None
    assert raw_identifier([1, 2]) is None
