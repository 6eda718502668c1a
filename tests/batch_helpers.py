"""Helpers for the batch tests: capnote as a real process, the text output read back into
counts, and the HTML report read back into its tables."""

from __future__ import annotations

import re
import subprocess
import sys
from collections import Counter
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

from tests.conftest import ROOT
from tests.test_cli_ndjson import _note as note
from tests.test_cli_ndjson import _peak_rss_kib as peak_rss_kib
from tests.test_cli_ndjson import write_ndjson

__all__ = ["NOW", "note", "peak_rss_kib", "write_ndjson"]

NOW = "2026-12-01T12:00:00+00:00"
CAPNOTE = [sys.executable, "-c", "from capnote.cli import main; main()"]


def capnote(
    *args: str, cwd: Path = ROOT, stdin: str | None = None
) -> subprocess.CompletedProcess[str]:
    """One capnote process, as a user runs it."""
    return subprocess.run(
        [*CAPNOTE, *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        input=stdin,
        timeout=300,
        check=False,
    )


# "file:12: warning     result.iop_after[0].value_mmhg  [iop-rise-moderate] IOP rose ..."
_STREAMED = re.compile(
    r"^(?P<file>.+?):(?P<line>\d+): (?P<sev>\w+) +(?P<loc>\S+)  \[(?P<code>[^]]+)\]"
)
# A whole JSON file's block: "name (note): FAILED", then "  error       eye  [code] ..."
_BLOCK_HEAD = re.compile(r"^(?P<file>\S.*) \((?P<kind>note|fhir|file)\): (ok|FAILED)$")
_BLOCK_LINE = re.compile(
    r"^  (?P<sev>error|warning|information) +(?P<loc>\S+)  \[(?P<code>[^]]+)\]"
)
_SUMMARY = re.compile(
    r"(?P<records>\d+) record\(s\) in (?P<files>\d+) file\(s\): (?P<passed>\d+) without errors, "
    r"(?P<failed>\d+) with errors; (?P<errors>\d+) error\(s\), (?P<warnings>\d+) warning\(s\), "
    r"(?P<information>\d+) information"
)

Located = tuple[
    str, str, str, str, str
]  # file, line ("-" for a whole file), location, severity, code


def text_findings(stdout: str) -> list[Located]:
    """Every finding the text output lists, located as the report locates it."""
    found: list[Located] = []
    block: str | None = None
    for line in stdout.splitlines():
        if m := _STREAMED.match(line):
            block = None
            loc = "" if m["loc"] == "(payload)" else m["loc"]
            found.append((m["file"], m["line"], loc, m["sev"], m["code"]))
        elif m := _BLOCK_HEAD.match(line):
            block = m["file"]
        elif block is not None and (m := _BLOCK_LINE.match(line)):
            loc = "" if m["loc"] == "(payload)" else m["loc"]
            found.append((block, "-", loc, m["sev"], m["code"]))
    return found


def text_tally(stdout: str) -> dict[str, int]:
    """The numbers of the closing line of a streamed check."""
    m = _SUMMARY.search(stdout)
    assert m is not None, stdout[-2000:]
    return {k: int(v) for k, v in m.groupdict().items()}


def by_code(found: list[Located]) -> Counter[tuple[str, str]]:
    """Findings counted per (code, severity)."""
    return Counter((code, sev) for _f, _l, _loc, sev, code in found)


@dataclass
class Row:
    """One table row of the report: the top-level section it is in, the innermost section's
    attributes (a file's group of records, a code's rows), its attributes and cell texts."""

    section: str
    group: dict[str, str]
    attrs: dict[str, str]
    cells: list[str] = field(default_factory=list)
    values: list[str] = field(default_factory=list)  # data-value of numbers, in order
    links: list[str] = field(default_factory=list)  # href of links in the row


class ReportPage(HTMLParser):
    """The report's rows by section, its counts by id, every tag name used, the ids in
    document order and the sections' attributes."""

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.rows: list[Row] = []
        self.counts: dict[str, int] = {}
        self.tags: Counter[str] = Counter()
        self.attributes: list[tuple[str, str, str]] = []
        self.ids: list[str] = []
        self.sections: list[dict[str, str]] = []
        self._stack: list[dict[str, str]] = []
        self._row: Row | None = None
        self._cell: list[str] | None = None
        self._count_id: str | None = None
        self.feed(text)
        self.close()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        self.tags[tag] += 1
        self.attributes += [(tag, k, v) for k, v in a.items()]
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "section":
            self._stack.append(a)
            self.sections.append(a)
        elif tag == "tr":
            top = self._stack[0].get("id", "") if self._stack else ""
            group = self._stack[-1] if self._stack else {}
            self._row = Row(top, group, a)
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []
            if a.get("id", "").startswith("count-"):
                self._count_id = a["id"].removeprefix("count-")
        elif tag == "br" and self._cell is not None:
            self._cell.append("\n")
        elif tag == "a" and self._row is not None:
            self._row.links.append(a.get("href", ""))
        elif tag == "span" and "data-value" in a:
            if self._row is not None:
                self._row.values.append(a["data-value"])
            if self._count_id is not None:
                self.counts[self._count_id] = int(a["data-value"])

    def handle_endtag(self, tag: str) -> None:
        if tag == "section" and self._stack:
            self._stack.pop()
        elif tag in ("td", "th") and self._row is not None and self._cell is not None:
            self._row.cells.append("".join(self._cell))
            self._cell = None
            self._count_id = None
        elif tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell.append(data)

    def body_rows(self, section: str) -> list[Row]:
        """The rows of a section's tables that hold data (a class), not headings."""
        return [r for r in self.rows if r.section == section and r.attrs.get("class")]

    def error_findings(self) -> list[tuple[str, str, str, str, str]]:
        """Every finding listed among the records with errors, located as text output
        locates it: (file, line, location, severity, code)."""
        found = []
        line = ""
        for r in self.body_rows("errors"):
            cells = r.cells
            if len(cells) == 7:  # a record's first row: the record cell comes first
                head = cells[0].split("\n")[0]
                line = "-" if head == "whole file" else head.removeprefix("line ").replace(",", "")
                cells = cells[1:]
            location = "" if cells[1] == "(payload)" else cells[1]
            found.append((r.group["data-file"], line, location, cells[0], cells[2]))
        return found
