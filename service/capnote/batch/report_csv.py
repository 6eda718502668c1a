"""The CSV report: a header row and one row per finding, written as results pass."""

from __future__ import annotations

import csv
import unicodedata
from pathlib import Path

from capnote.batch.checking import RecordResult
from capnote.batch.output import AtomicFile, RunInfo, rows

COLUMNS = (
    "file",
    "line",
    "kind",
    "record",
    "location",
    "severity",
    "code",
    "message",
    "allowed",
    "source",
)
# OWASP, "CSV Injection": spreadsheet programs run a cell that starts with =, +, -, @, tab or
# carriage return as a formula; a leading apostrophe makes them show it as text instead.
# Findings echo what the input held, so every text cell is guarded. Spreadsheets also skip
# leading spaces before a formula and read the full-width forms (U+FF1D and its kin) as the
# ASCII ones, so the first character after any spaces is compared in its NFKC form.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
BOM = "\ufeff"


def cell(text: str | None) -> str:
    """A text cell that a spreadsheet shows as text, never runs as a formula."""
    if not text:
        return ""
    if text.startswith(FORMULA_STARTS):
        return "'" + text
    rest = text.lstrip()
    if rest and unicodedata.normalize("NFKC", rest[0]).startswith(FORMULA_STARTS):
        return "'" + text
    return text


class CsvReport:
    """Rows go straight into the temporary file; commit renames it into place.

    RFC 4180 layout (comma, double quotes, CRLF) in UTF-8. The line is empty for a whole
    JSON file: a "-" there would be taken for the start of a formula. With bom, the file
    starts with a UTF-8 byte order mark, which some spreadsheet programs need to read UTF-8.
    """

    def __init__(self, target: Path, bom: bool = False) -> None:
        self.target = target
        self._file = AtomicFile(target)
        text = self._file.text()
        if bom:
            text.write(BOM)
        self._writer = csv.writer(text, lineterminator="\r\n")
        self._writer.writerow(COLUMNS)

    def add(self, result: RecordResult) -> None:
        """Write a row per finding of the result."""
        for row in rows(result):
            f = row.finding
            self._writer.writerow(
                (
                    cell(row.file),
                    "" if row.line is None else row.line,
                    row.kind,
                    cell(row.identifier),
                    cell(f.location),
                    f.severity.value,
                    cell(f.code),
                    cell(f.message),
                    cell(f.allowed),
                    cell(f.source),
                )
            )

    def commit(self, run: RunInfo) -> None:
        """Put the finished file in place (the CSV has no header facts: one table only)."""
        self._file.commit()

    def discard(self) -> None:
        """Drop the partial file."""
        self._file.discard()
