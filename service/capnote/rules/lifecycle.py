"""The rules of a note's life: when an amendment or a void may be stored.

Pure functions of the latest stored version and the request: each answers "already done"
(a retry of what landed), "store it", or raises the error the caller gets. NoteService does
the reading and the writing around them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from capnote.errors import ConflictError
from capnote.note import Note
from capnote.note_input import check_match, problem

Decision = Literal["already-stored", "store"]


@dataclass(frozen=True, slots=True)
class Latest:
    """What the rules need of a note's latest stored version."""

    version: int
    status: str  # draft | final | void
    content_hash: str
    note: Note


def amendment(
    latest: Latest, note: Note, content_hash: str, reason: str | None, if_match: int
) -> Decision:
    """Whether an amendment is stored: the same content again is a retry that landed; a
    void note cannot change; a signed note needs a reason and stays signed; an amendment
    keeps its patient and eye (moving a note would move its results between charts at
    every receiver)."""
    if latest.content_hash == content_hash and latest.status != "void":
        return "already-stored"
    check_match(latest.version, if_match)
    if latest.status == "void":
        raise ConflictError("the note was voided; it cannot be amended")
    if latest.status == "final" and not reason:
        raise problem(
            "missing-field",
            "reason",
            "amending a signed note needs a reason",
            "a final note is amended only with a reason",
        )
    if latest.status == "final" and note.status == "draft":
        raise problem(
            "status-regression",
            "note.status",
            "a signed note cannot go back to draft",
            "once final, later versions are final",
        )
    old = latest.note
    for field, before, after in (
        (
            "note.patient",
            (old.patient.system, old.patient.value),
            (note.patient.system, note.patient.value),
        ),
        ("note.eye", old.eye, note.eye),
    ):
        if before != after:
            raise problem(
                "identity-change",
                field,
                f"an amendment cannot change {field.removeprefix('note.')}",
                "void this note with a reason, then send a new note for the right patient and eye",
            )
    return "store"


def voiding(latest: Latest, if_match: int) -> Decision:
    """Whether a void is stored: a void note is voided already (a retry, or someone else
    did); otherwise If-Match must name the latest version."""
    if latest.status == "void":
        return "already-stored"
    check_match(latest.version, if_match)
    return "store"
