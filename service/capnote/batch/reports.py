"""Which report a file name asks for, and the writer that makes it."""

from __future__ import annotations

from pathlib import Path

from capnote.batch.output import ReportWriter
from capnote.batch.report_csv import CsvReport
from capnote.batch.report_html import HtmlReport
from capnote.errors import UsageError

# The name's ending decides the format unless it is given; .htm is how some systems spell it.
FORMATS = {".html": "html", ".htm": "html", ".csv": "csv"}
NAMES = ("html", "csv")


def report_format(target: Path, given: str | None = None) -> str:
    """html or csv: the given format, else the one the file name ends in; UsageError if neither."""
    if given is not None:
        if given.lower() not in NAMES:
            raise UsageError(f"report format {given!r} is not one of: {', '.join(NAMES)}")
        return given.lower()
    found = FORMATS.get(target.suffix.lower())
    if found is None:
        endings = ", ".join(FORMATS)
        raise UsageError(
            f"cannot tell the report format from {target.name!r}: name a file ending in "
            f"{endings}, or give --report-format"
        )
    return found


def open_report(target: Path, fmt: str, bom: bool = False) -> ReportWriter:
    """A writer for the report; its temporary file already exists beside the target. bom
    asks a CSV report for a UTF-8 byte order mark (an HTML page says its charset)."""
    return HtmlReport(target) if fmt == "html" else CsvReport(target, bom)
