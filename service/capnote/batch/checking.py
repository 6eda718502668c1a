"""Checking a batch: each record becomes a result, and a tally counts them as they pass."""

from __future__ import annotations

import json
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import orjson

from capnote.assess import Assessor
from capnote.batch.identity import SeenNotes, raw_identifier
from capnote.batch.inputs import Record, Source
from capnote.derive import Derived
from capnote.findings import Finding, Severity, has_errors
from capnote.note import Identifier, Note
from capnote.rules import Context, check_payload
from capnote.schedule import DueItem

NOTE = "note"
FHIR = "fhir"
FILE = "file"  # an input that could not be read: neither a note nor a resource
EMPTY = "empty"  # an NDJSON file without a single record: named, never counted as a record
_NAMED = 5  # empty files named in the closing line; the report names every one


@dataclass(frozen=True, slots=True)
class RecordResult:
    """What one record gave: its findings and, for a whole note file, what follows from it."""

    source: Source
    line: int | None
    kind: str
    findings: list[Finding]
    derived: Derived | None = None
    due: tuple[DueItem, ...] = ()
    # Who the record is: a note's identifier (made into text only when a report asks), or
    # what a record that is no note names (a resource's type/id).
    note_id: Identifier | None = None
    named: str | None = None

    @property
    def identifier(self) -> str | None:
        """The note identifier as system|value, or a resource's resourceType/id."""
        ident = self.note_id
        return f"{ident.system}|{ident.value}" if ident is not None else self.named

    @property
    def failed(self) -> bool:
        """True when any finding is an error."""
        return any(f.severity is Severity.ERROR for f in self.findings)


@dataclass(frozen=True, slots=True)
class Checked:
    """What one record is and what its check found."""

    kind: str
    findings: list[Finding]
    note: Note | None = None
    named: str | None = None  # what a record that is no note names (raw_identifier)


def _loose(raw: bytes) -> Any:
    """The record as Python's own JSON reader takes it, which reads what orjson refuses for
    a number (1e400 becomes infinity): enough to tell what the record is, never to check it."""
    try:
        return json.loads(raw)
    except (ValueError, RecursionError):
        return None


def _problem(error: orjson.JSONDecodeError) -> str:
    """What is wrong with the JSON and where, in the reader's words."""
    what = error.msg
    if "infinity" in what or "out of range" in what:
        what = "a number too large to hold (such as 1e400)"
    return f"{what} at line {error.lineno}, column {error.colno}"


def _unparsed_resource(raw: bytes, error: orjson.JSONDecodeError) -> Checked | None:
    """A record that names resourceType but is not well-formed JSON: a FHIR resource with
    one finding, rather than a note with every field missing."""
    data = _loose(raw)
    if isinstance(data, dict):
        if "resourceType" not in data:
            return None
    elif b'"resourceType"' not in raw:
        return None
    kind = data.get("resourceType") if isinstance(data, dict) else None
    finding = Finding(
        severity=Severity.ERROR,
        code="json-invalid",
        location=kind if isinstance(kind, str) else "",
        message=f"the resource is not valid JSON: {_problem(error)}",
        rule="a FHIR resource is well-formed JSON (RFC 8259) with finite numbers",
        issue_type="structure",
    )
    return Checked(FHIR, [finding], named=raw_identifier(data))


def what_record(raw: bytes, ctx: Context) -> Checked:
    """One NDJSON line (or whole file): a FHIR resource when it names resourceType, else a
    note, with its findings.

    Only the findings are computed: a streamed check prints nothing else, so deriving,
    scheduling and emitting each note would cost four fifths of the time for no output.
    """
    note, findings = check_payload(raw, ctx)
    if note is not None:
        return Checked(NOTE, findings, note)
    # A record that is not a note may be a FHIR resource: it names resourceType (or escapes a
    # character, which might spell it). Asked only after the note contract refused it, so the
    # common case, a note, is parsed once and never searched.
    data: Any = None
    if b"resourceType" in raw or b"\\u" in raw:
        try:
            data = orjson.loads(raw)
        except orjson.JSONDecodeError as exc:
            unparsed = _unparsed_resource(raw, exc)
            if unparsed is not None:
                return unparsed
        if isinstance(data, dict) and "resourceType" in data:
            return Checked(FHIR, _resource_findings(data), named=raw_identifier(data))
    else:
        try:
            data = orjson.loads(raw)
        except orjson.JSONDecodeError:
            data = None
    return Checked(NOTE, findings, named=raw_identifier(data))


def resource_type(raw: bytes) -> str | None:
    """The resourceType a record names, if it is a FHIR resource (even one whose JSON does
    not parse, such as a number too large for a double; "" when the name cannot be read);
    None for anything else."""
    if b"resourceType" not in raw and b"\\u" not in raw:
        return None
    try:
        data = orjson.loads(raw)
    except orjson.JSONDecodeError:
        data = _loose(raw)
        if data is None:
            return "" if b'"resourceType"' in raw else None
    if isinstance(data, dict) and "resourceType" in data:
        kind = data["resourceType"]
        return kind if isinstance(kind, str) else ""
    return None


def check_record(raw: bytes, ctx: Context) -> tuple[str, list[Finding]]:
    """One NDJSON line: ("fhir", findings) when it is a FHIR resource, else ("note", ...)."""
    checked = what_record(raw, ctx)
    return checked.kind, checked.findings


def _ndjson_hint(raw: bytes) -> Finding | None:
    """A whole .json file that holds one JSON object per line: the hint to read it as NDJSON."""
    lines = [line for line in raw.splitlines() if line.strip()]
    if len(lines) < 2:
        return None
    try:
        first = orjson.loads(lines[0])
    except orjson.JSONDecodeError:
        return None
    if not isinstance(first, dict):
        return None
    return Finding(
        severity=Severity.ERROR,
        code="json-holds-ndjson",
        location="",
        message=f"the file holds {len(lines):,} lines of JSON, one object each (NDJSON), not "
        "one JSON document: check it with --ndjson, or name it .ndjson",
        rule="a .json file holds one note or resource; NDJSON files end in .ndjson",
        issue_type="structure",
    )


def _resource_findings(data: dict[str, object]) -> list[Finding]:
    """A FHIR resource's findings (capnote.fhir.validate and its R4 table, loaded on the
    first resource met: a batch of notes alone never waits for them)."""
    from capnote.fhir.validate import validate_resource

    return validate_resource(data)


class Checker:
    """Checks records against one policy at one present time, and notes each note
    identifier it meets, to find the same one twice."""

    def __init__(self, assessor: Assessor, now: datetime) -> None:
        self.assessor = assessor
        self.now = now
        self.ctx = Context(assessor.policy, now)
        self.seen = SeenNotes()

    def check_file(self, record: Record) -> RecordResult:
        """A whole JSON file: a FHIR resource when it has a resourceType, else a note."""
        source, raw = record.source, record.data or b""
        checked = what_record(raw, self.ctx)
        if checked.kind == FHIR:
            return RecordResult(source, None, FHIR, checked.findings, named=checked.named)
        if checked.note is None:
            hint = _ndjson_hint(raw)
            if hint is not None:
                return RecordResult(source, None, FILE, [hint])
            return RecordResult(source, None, NOTE, checked.findings, named=checked.named)
        findings = self._repeat(checked, record)
        if has_errors(checked.findings):
            return RecordResult(source, None, NOTE, findings, note_id=checked.note.note_id)
        # A single note gets the whole job: its derived values and due items are shown.
        result = self.assessor.complete(checked.note, checked.findings)
        return RecordResult(
            source, None, NOTE, findings, result.derived, result.due, checked.note.note_id
        )

    def _repeat(self, checked: Checked, record: Record) -> list[Finding]:
        """The findings, with one more when the note's identifier was met before; only notes
        the service would store count (one with errors is refused, so it is no first)."""
        if checked.note is None or record.data is None or has_errors(checked.findings):
            return checked.findings
        again = self.seen.meet(checked.note, record.data, record)
        return checked.findings if again is None else [*checked.findings, again]

    def check(self, record: Record) -> RecordResult:
        """The result of one record."""
        if record.data is None:
            if record.failure is None:
                return RecordResult(record.source, record.line, EMPTY, [])
            return RecordResult(record.source, record.line, FILE, [record.failure])
        if record.line is None:
            return self.check_file(record)
        checked = what_record(record.data, self.ctx)
        findings = self._repeat(checked, record)
        note_id = checked.note.note_id if checked.note is not None else None
        return RecordResult(
            record.source, record.line, checked.kind, findings, note_id=note_id, named=checked.named
        )

    def results(self, records: Iterable[Record]) -> Iterator[RecordResult]:
        """The result of each record, in order, one at a time."""
        for record in records:
            yield self.check(record)


@dataclass(slots=True)
class Tally:
    """What a batch keeps of its results: counters only, so memory stays flat however long
    the input is (and the names of empty files, at most one per input file)."""

    records: int = 0
    failed: int = 0
    errors: int = 0
    warnings: int = 0
    information: int = 0
    skipped: int = 0  # what folder walks passed over (hidden, other endings, linked folders)
    empty: list[str] = field(default_factory=list)

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

    def take(self, result: RecordResult) -> None:
        """Count one result: a record, or an empty file, which is named and not counted."""
        if result.kind == EMPTY:
            self.empty.append(result.source.shown)
        else:
            self.add(result.findings)

    @property
    def passed(self) -> int:
        """Records without errors."""
        return self.records - self.failed

    def _findings(self) -> str:
        return f"{self.errors} error(s), {self.warnings} warning(s), {self.information} information"

    def _others(self) -> str:
        parts = []
        if self.empty:
            names = ", ".join(self.empty[:_NAMED])
            more = f" and {len(self.empty) - _NAMED} more" if len(self.empty) > _NAMED else ""
            parts.append(f"{len(self.empty)} empty file(s): {names}{more}")
        if self.skipped:
            parts.append(f"{self.skipped} file(s) skipped in folders")
        return "".join(f"; {p}" for p in parts)

    def summary(self, files: int) -> str:
        """The closing line of a streamed check: records (lines and JSON files), in files."""
        return (
            f"{self.records} record(s) in {files} file(s): {self.passed} without errors, "
            f"{self.failed} with errors; {self._findings()}{self._others()}"
        )

    def file_summary(self) -> str:
        """The closing line of a check of whole files, where each file is one record."""
        return (
            f"{self.records} file(s): {self.passed} without errors, {self.failed} with errors; "
            f"{self._findings()}{self._others()}"
        )
