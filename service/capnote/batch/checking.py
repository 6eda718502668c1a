"""Checking a batch: each record becomes a result, and a tally counts them as they pass."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from datetime import datetime

import orjson

from capnote.assess import Assessor
from capnote.batch.inputs import Record, Source
from capnote.derive import Derived
from capnote.findings import Finding, Severity
from capnote.rules import Context, check_payload
from capnote.schedule import DueItem

NOTE = "note"
FHIR = "fhir"
FILE = "file"  # an input that could not be read: neither a note nor a resource


@dataclass(frozen=True, slots=True)
class RecordResult:
    """What one record gave: its findings and, for a whole note file, what follows from it."""

    source: Source
    line: int | None
    kind: str
    findings: list[Finding]
    derived: Derived | None = None
    due: tuple[DueItem, ...] = ()

    @property
    def failed(self) -> bool:
        """True when any finding is an error."""
        return any(f.severity is Severity.ERROR for f in self.findings)


def check_record(raw: bytes, ctx: Context) -> tuple[str, list[Finding]]:
    """One NDJSON line: ("fhir", findings) when it is a FHIR resource, else ("note", ...).

    Only the findings are computed: a streamed check prints nothing else, so deriving,
    scheduling and emitting each note would cost four fifths of the time for no output.
    """
    note, findings = check_payload(raw, ctx)
    # A line that is not a note may be a FHIR resource: it names resourceType (or escapes a
    # character, which might spell it). Asked only after the note contract refused the line,
    # so the common case, a note, is parsed once and its line never searched.
    if note is None and (b"resourceType" in raw or b"\\u" in raw):
        try:
            data = orjson.loads(raw)
        except orjson.JSONDecodeError:
            data = None
        if isinstance(data, dict) and "resourceType" in data:
            return FHIR, _resource_findings(data)
    return NOTE, findings


def _resource_findings(data: dict[str, object]) -> list[Finding]:
    """A FHIR resource's findings (capnote.fhir.validate and its R4 table, loaded on the
    first resource met: a batch of notes alone never waits for them)."""
    from capnote.fhir.validate import validate_resource

    return validate_resource(data)


class Checker:
    """Checks records against one policy at one present time."""

    def __init__(self, assessor: Assessor, now: datetime) -> None:
        self.assessor = assessor
        self.now = now
        self.ctx = Context(assessor.policy, now)

    def check_file(self, source: Source, raw: bytes) -> RecordResult:
        """A whole JSON file: a FHIR resource when it has a resourceType, else a note."""
        try:
            data = orjson.loads(raw)
        except orjson.JSONDecodeError:
            data = None
        if isinstance(data, dict) and "resourceType" in data:
            return RecordResult(source, None, FHIR, _resource_findings(data))
        # A single note gets the whole job: its derived values and due items are shown.
        result = self.assessor.assess(raw, self.now)
        return RecordResult(source, None, NOTE, result.findings, result.derived, result.due)

    def check(self, record: Record) -> RecordResult:
        """The result of one record."""
        if record.data is None:
            failure = [record.failure] if record.failure is not None else []
            return RecordResult(record.source, record.line, FILE, failure)
        if record.line is None:
            return self.check_file(record.source, record.data)
        kind, findings = check_record(record.data, self.ctx)
        return RecordResult(record.source, record.line, kind, findings)

    def results(self, records: Iterable[Record]) -> Iterator[RecordResult]:
        """The result of each record, in order, one at a time."""
        for record in records:
            yield self.check(record)


@dataclass(slots=True)
class Tally:
    """What a batch keeps of its results: counters only, so memory stays flat however long
    the input is."""

    records: int = 0
    failed: int = 0
    errors: int = 0
    warnings: int = 0
    information: int = 0

    def add(self, findings: Iterable[Finding]) -> None:
        """Count one record's findings."""
        self.records += 1
        errors = 0
        for f in findings:
            if f.severity is Severity.ERROR:
                errors += 1
            elif f.severity is Severity.WARNING:
                self.warnings += 1
            else:
                self.information += 1
        self.errors += errors
        self.failed += 1 if errors else 0

    @property
    def passed(self) -> int:
        """Records without errors."""
        return self.records - self.failed

    def _findings(self) -> str:
        return f"{self.errors} error(s), {self.warnings} warning(s), {self.information} information"

    def summary(self, files: int) -> str:
        """The closing line of a streamed check: records (lines and JSON files), in files."""
        return (
            f"{self.records} record(s) in {files} file(s): {self.passed} without errors, "
            f"{self.failed} with errors; {self._findings()}"
        )

    def file_summary(self) -> str:
        """The closing line of a check of whole files, where each file is one record."""
        return (
            f"{self.records} file(s): {self.passed} without errors, {self.failed} with errors; "
            f"{self._findings()}"
        )
