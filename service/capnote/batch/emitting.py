"""Emitting a batch: each note becomes one compact Bundle, and notes with errors are skipped.

One Bundle per note identifier, as the service stores one note per identifier: a note met
again with the same content is named and not emitted twice; with other content it is an
error (the service's 409) and skipped.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from datetime import datetime

import orjson

from capnote.assess import Assessor
from capnote.batch.checking import resource_type
from capnote.batch.identity import SeenNotes
from capnote.batch.inputs import Record
from capnote.findings import Finding, Severity
from capnote.plain_text import finding_line


@dataclass(frozen=True, slots=True)
class Emitted:
    """One note's outcome: its Bundle as one line of JSON, or the errors that stopped it."""

    record: Record
    bundle: bytes | None
    errors: tuple[Finding, ...] = ()
    repeated: Finding | None = None  # the same note as an earlier one: not emitted again

    @property
    def empty(self) -> bool:
        """True for an NDJSON file without a record: named, never counted as a note."""
        return self.record.empty

    @property
    def where(self) -> str:
        """file:line, or file alone for a whole JSON file."""
        name = self.record.source.shown
        return name if self.record.line is None else f"{name}:{self.record.line}"

    def error_lines(self) -> list[str]:
        """One line per error (or the note of a repeat, or of an empty file), as file:line."""
        if self.empty:
            return [f"{self.where}: empty, no records"]
        shown = self.errors if self.repeated is None else (*self.errors, self.repeated)
        return [f"{self.where}: {finding_line(f).lstrip()}" for f in shown]


def not_a_note(kind: str) -> Finding:
    """The finding for a FHIR resource given to emit, which turns notes into resources."""
    return Finding(
        severity=Severity.ERROR,
        code="not-a-note",
        location="resourceType",
        message=f"this is a FHIR {kind + ' ' if kind else ''}resource, not a note: emit makes "
        "FHIR resources from notes (capnote check validates resources)",
        rule="capnote emit takes capsulotomy notes (schemas/note.schema.json)",
        issue_type="not-supported",
    )


def emit_records(records: Iterable[Record], assessor: Assessor, now: datetime) -> Iterator[Emitted]:
    """A Bundle for each clean note, in input order, one at a time.

    Each note is assessed on its own, as `capnote emit` assesses one file: earlier sessions of
    the same eye in the batch do not add to its cumulative energy.
    """
    seen = SeenNotes()
    for record in records:
        if record.data is None:
            failure = (record.failure,) if record.failure is not None else ()
            yield Emitted(record, None, failure)
            continue
        kind = resource_type(record.data)
        if kind is not None:
            yield Emitted(record, None, (not_a_note(kind),))
            continue
        result = assessor.assess(record.data, now)
        if result.bundle is None or result.note is None:
            yield Emitted(record, None, tuple(f for f in result.findings if f.blocking))
            continue
        again = seen.meet(result.note, record.data, record)
        if again is not None and again.blocking:
            yield Emitted(record, None, (again,))
        elif again is not None:
            yield Emitted(record, None, repeated=again)
        else:
            yield Emitted(record, orjson.dumps(result.bundle))


@dataclass(slots=True)
class EmitTally:
    """Counts of a batch emit."""

    records: int = 0
    emitted: int = 0
    repeated: int = 0
    empty: int = 0
    skipped_files: int = 0  # what folder walks passed over

    def add(self, item: Emitted) -> None:
        """Count one note (an empty file is counted apart)."""
        if item.empty:
            self.empty += 1
            return
        self.records += 1
        self.emitted += item.bundle is not None
        self.repeated += item.repeated is not None

    @property
    def skipped(self) -> int:
        """Notes not emitted because of errors."""
        return self.records - self.emitted - self.repeated

    def summary(self, files: int) -> str:
        """The closing line, for standard error."""
        text = (
            f"{self.emitted} Bundle(s) from {self.records} record(s) in {files} file(s); "
            f"{self.skipped} skipped for errors"
        )
        if self.repeated:
            text += f"; {self.repeated} repeated note(s) emitted once"
        if self.empty:
            text += f"; {self.empty} empty file(s)"
        if self.skipped_files:
            text += f"; {self.skipped_files} file(s) skipped in folders"
        return text
