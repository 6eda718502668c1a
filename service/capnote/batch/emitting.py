"""Emitting a batch: each note becomes one compact Bundle, and notes with errors are skipped."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from datetime import datetime

import orjson

from capnote.assess import Assessor
from capnote.batch.inputs import Record
from capnote.findings import Finding
from capnote.plain_text import finding_line


@dataclass(frozen=True, slots=True)
class Emitted:
    """One note's outcome: its Bundle as one line of JSON, or the errors that stopped it."""

    record: Record
    bundle: bytes | None
    errors: tuple[Finding, ...] = ()

    @property
    def where(self) -> str:
        """file:line, or file alone for a whole JSON file."""
        name = self.record.source.shown
        return name if self.record.line is None else f"{name}:{self.record.line}"

    def error_lines(self) -> list[str]:
        """One line per error, located as file:line."""
        return [f"{self.where}: {finding_line(f).lstrip()}" for f in self.errors]


def emit_records(records: Iterable[Record], assessor: Assessor, now: datetime) -> Iterator[Emitted]:
    """A Bundle for each clean note, in input order, one at a time.

    Each note is assessed on its own, as `capnote emit` assesses one file: earlier sessions of
    the same eye in the batch do not add to its cumulative energy.
    """
    for record in records:
        if record.data is None:
            failure = (record.failure,) if record.failure is not None else ()
            yield Emitted(record, None, failure)
            continue
        result = assessor.assess(record.data, now)
        if result.bundle is None:
            yield Emitted(record, None, tuple(f for f in result.findings if f.blocking))
            continue
        yield Emitted(record, orjson.dumps(result.bundle))


@dataclass(slots=True)
class EmitTally:
    """Counts of a batch emit."""

    records: int = 0
    emitted: int = 0

    def add(self, item: Emitted) -> None:
        """Count one note."""
        self.records += 1
        self.emitted += item.bundle is not None

    @property
    def skipped(self) -> int:
        """Notes not emitted because of errors."""
        return self.records - self.emitted

    def summary(self, files: int) -> str:
        """The closing line, for standard error."""
        return (
            f"{self.emitted} Bundle(s) from {self.records} record(s) in {files} file(s); "
            f"{self.skipped} skipped for errors"
        )
