"""The amend and void rules as pure functions (capnote.rules.lifecycle), no store needed."""

from __future__ import annotations

import json
from typing import Any

import pytest

from capnote.errors import ConflictError, InputError, PreconditionError
from capnote.note import Note
from capnote.rules.lifecycle import Latest, amendment, voiding
from tests.conftest import routine


def note(**changes: Any) -> Note:
    data = routine()
    data.update(changes)
    return Note.model_validate_json(json.dumps(data))


def latest(status: str = "final", version: int = 2) -> Latest:
    return Latest(
        version, status, "hash-of-v2", note(status="final" if status != "draft" else "draft")
    )


def code_of(exc: InputError) -> tuple[str, str]:
    return exc.findings[0].code, exc.findings[0].location


def test_the_same_content_again_is_a_retry_that_landed() -> None:
    assert amendment(latest(), note(), "hash-of-v2", None, 1) == "already-stored"


def test_a_changed_signed_note_needs_a_reason_and_the_latest_version() -> None:
    with pytest.raises(InputError) as missing:
        amendment(latest(), note(), "other", None, 2)
    assert code_of(missing.value) == ("missing-field", "reason")
    with pytest.raises(PreconditionError):
        amendment(latest(), note(), "other", "re-measured", 1)  # If-Match names version 1
    assert amendment(latest(), note(), "other", "re-measured", 2) == "store"


def test_a_signed_note_stays_signed_and_a_void_one_stays_void() -> None:
    with pytest.raises(InputError) as back:
        amendment(latest(), note(status="draft"), "other", "undo", 2)
    assert code_of(back.value) == ("status-regression", "note.status")
    with pytest.raises(ConflictError):
        amendment(latest("void"), note(), "hash-of-v2", "again", 2)


@pytest.mark.parametrize(
    ("changes", "location"),
    [
        ({"eye": "left"}, "note.eye"),
        ({"patient": {"system": "urn:x", "value": "2"}}, "note.patient"),
    ],
)
def test_an_amendment_keeps_its_patient_and_eye(changes: dict[str, Any], location: str) -> None:
    with pytest.raises(InputError) as moved:
        amendment(latest("draft"), note(**changes), "other", None, 2)
    assert code_of(moved.value) == ("identity-change", location)
    assert "void this note with a reason" in moved.value.findings[0].rule


def test_voiding() -> None:
    assert voiding(latest("void"), 1) == "already-stored"  # a retry, whatever If-Match says
    assert voiding(latest(), 2) == "store"
    with pytest.raises(PreconditionError):
        voiding(latest(), 1)
