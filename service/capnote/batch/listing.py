"""What a check prints on standard output: text for people, JSON for programs.

Each listing takes results one at a time; only the Bundle of OperationOutcomes, which is one
JSON document, has to hold its entries until the end.
"""

from __future__ import annotations

from typing import Any, Protocol, TextIO

import orjson

from capnote.batch.checking import RecordResult, Tally
from capnote.fhir.outcome import outcome
from capnote.plain_text import CAUTION, derived_lines, due_line, finding_line


class Listing(Protocol):
    """Standard output of a check."""

    def add(self, result: RecordResult) -> None:
        """Print (or keep) one result."""

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """Print what comes after the last result."""


class TextListing:
    """A block per whole file (findings, derived values, follow-up), and a line per finding
    of a streamed record, located as file:line; clean lines print nothing."""

    def __init__(self, out: TextIO) -> None:
        self.write = out.write

    def add(self, result: RecordResult) -> None:
        """Print one result."""
        name = result.source.shown
        if not result.source.streamed:
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
        line = tally.summary(files) if streamed else tally.file_summary()
        self.write(f"{line}\n{CAUTION}\n")


class NdjsonListing:
    """One {"file", "line", "outcome"} object per record, an OperationOutcome in each."""

    def __init__(self, out: TextIO) -> None:
        self.write = out.write

    def add(self, result: RecordResult) -> None:
        """Print one record's object."""
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
        url = result.source.path.resolve().as_uri()
        self.entries.append({"fullUrl": url, "resource": outcome(result.findings)})

    def close(self, tally: Tally, files: int, streamed: bool) -> None:
        """Print the Bundle."""
        report = {"resourceType": "Bundle", "type": "collection", "entry": self.entries}
        self.out.write(orjson.dumps(report, option=orjson.OPT_INDENT_2).decode() + "\n")
