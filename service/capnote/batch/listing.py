"""What a check prints on standard output: text for people, JSON for programs.

Each listing takes results one at a time; only the Bundle of OperationOutcomes, which is one
JSON document, has to hold its entries until the end.
"""

from __future__ import annotations

from typing import Any, Protocol, TextIO

import orjson

from capnote.batch.checking import EMPTY, RecordResult, Tally
from capnote.fhir.outcome import outcome
from capnote.plain_text import CAUTION, derived_lines, due_line, finding_line


class Listing(Protocol):
    """Standard output of a check."""

    def add(self, result: RecordResult) -> None:
        """Print (or keep) one result."""

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """Print what comes after the last result."""


def summary_lines(tally: Tally, files: int, streamed: bool) -> str:
    """The closing line (records when anything was streamed, else files) and the caution."""
    line = tally.summary(files) if streamed else tally.file_summary()
    return f"{line}\n{CAUTION}\n"


class SummaryListing:
    """The summary alone (--quiet, or a check with a report): nothing per record."""

    def __init__(self, summary_to: TextIO) -> None:
        self.summary_to = summary_to

    def add(self, result: RecordResult) -> None:
        """Nothing: the report or the summary says it."""

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """The summary line and the caution."""
        self.summary_to.write(summary_lines(tally, files, streamed))


class TextListing:
    """A block per whole file (findings, derived values, follow-up), and a line per finding
    of a streamed record, located as file:line; clean lines print nothing. The summary goes
    to summary_to: standard error when standard output is not a terminal, so the counts stay
    in sight when the findings go to a file or a pager."""

    def __init__(self, out: TextIO, summary_to: TextIO | None = None) -> None:
        self.write = out.write
        self.summary_to = summary_to if summary_to is not None else out

    def add(self, result: RecordResult) -> None:
        """Print one result."""
        name = result.source.shown
        if result.kind == EMPTY:
            self.write(f"{name}: empty, no records\n")
        elif not result.source.streamed:
            self._block(result)
        elif result.line is None:  # a streamed file that could not be opened
            for f in result.findings:
                self.write(f"{name}: {finding_line(f).lstrip()}\n")
        else:
            for f in result.findings:
                self.write(f"{name}:{result.line}: {finding_line(f).lstrip()}\n")

    def _block(self, result: RecordResult) -> None:
        state = "FAILED" if result.failed else "ok"
        lines = [f"{result.source.shown} ({result.kind}): {state}"]
        lines += [finding_line(f) for f in result.findings]
        if result.derived is not None:
            lines += derived_lines(result.derived)
        if result.due:
            lines.append("  follow-up:")
            lines += ["  " + due_line(item) for item in result.due]
        self.write("\n".join(lines) + "\n")

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """The summary line (records when anything was streamed, else files) and the caution."""
        self.summary_to.write(summary_lines(tally, files, streamed))


class NdjsonListing:
    """One {"file", "line", "outcome"} object per record, an OperationOutcome in each."""

    def __init__(self, out: TextIO) -> None:
        self.write = out.write

    def add(self, result: RecordResult) -> None:
        """Print one record's object (an empty file has none: the summary names it)."""
        if result.kind == EMPTY:
            return
        record = {
            "file": result.source.name,
            "line": result.line,
            "outcome": outcome(result.findings),
        }
        self.write(orjson.dumps(record).decode() + "\n")

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """Nothing follows: every line of the output is a record."""


class BundleListing:
    """A collection Bundle with an OperationOutcome per file, printed at the end."""

    def __init__(self, out: TextIO) -> None:
        self.out = out
        self.entries: list[dict[str, Any]] = []

    def add(self, result: RecordResult) -> None:
        """Keep the file's OperationOutcome for the Bundle."""
        if result.kind == EMPTY:
            return
        url = result.source.path.resolve().as_uri()
        self.entries.append({"fullUrl": url, "resource": outcome(result.findings)})

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """Print the Bundle."""
        report = {"resourceType": "Bundle", "type": "collection", "entry": self.entries}
        self.out.write(orjson.dumps(report, option=orjson.OPT_INDENT_2).decode() + "\n")
