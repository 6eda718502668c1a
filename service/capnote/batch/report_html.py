"""The HTML report: one self-contained page, records with errors first.

The page, top to bottom: the run and its counts; every record with an error, grouped by
file, each finding with its location, rule and allowed range; a table per file; the findings
by code and rule (each code linking to its rows) and a chart; then a section per code with
its rows: every error, and the first rows of each warning or information code, which can
run to hundreds of thousands (the CSV report lists every one). So the page stays a few MB
and opens in a second however large the batch.

Nothing is held per record: the records with errors stream into one unnamed temporary file
and each error code's rows into one of their own (beside the target, never /tmp, which may be
small or in memory); only counters, and a few sample rows per code, stay in memory. At commit
the header and the tables, which need the final counts, are written, and the rows copied
after them.
"""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path
from typing import TextIO

from capnote.batch.checking import EMPTY, FILE, RecordResult
from capnote.batch.output import AtomicFile, Row, RunInfo, rows
from capnote.batch.report_parts import (
    CODE_HEADINGS,
    EMPTY_NOTE,
    ERROR_HEADINGS,
    FILE_NOTES,
    OTHER_RULES,
    RULES_PER_CODE,
    SHOWN_INPUTS,
    TABLE_END,
    CodeCounts,
    FileCounts,
    Key,
    chart,
    code_heading,
    code_row,
    e,
    error_row,
    files_table,
    n,
    ranked,
    summary_table,
    table_start,
)
from capnote.batch.report_style import CHUNK_ROWS, STYLE
from capnote.findings import Severity
from capnote.plain_text import CAUTION

# Rows of each warning or information code shown in full; the rest are counted.
SAMPLE_ROWS = 20


class HtmlReport:
    """A report page built in two passes over constant memory."""

    def __init__(self, target: Path) -> None:
        self.target = target
        self._file = AtomicFile(target)
        self._temps: list[TextIO] = []
        try:
            self._errors = self._temp()
        except BaseException:
            self._file.discard()
            raise
        self.codes: dict[Key, CodeCounts] = {}
        self.files: dict[str, FileCounts] = {}
        self._error_rows: dict[Key, TextIO] = {}
        self._samples: dict[Key, list[str]] = {}
        self.failed = 0  # records with errors listed so far: their anchors are r1, r2, ...
        self._file_open: str | None = None  # the file whose group of records is open
        self._chunk = 0  # rows in the open chunk

    def _temp(self) -> TextIO:
        # Unnamed (deleted on close, and by the kernel if the process dies). It stays open
        # across add() calls, so no with-block: commit() and discard() close it.
        handle = tempfile.TemporaryFile(  # noqa: SIM115
            "w+", encoding="utf-8", newline="", dir=self.target.parent, prefix=".capnote-rows-"
        )
        self._temps.append(handle)
        return handle

    def add(self, result: RecordResult) -> None:
        """Count the result and write its rows where they belong."""
        name = result.source.name
        counts = self.files.get(name)
        if counts is None:
            counts = self.files[name] = FileCounts("NDJSON" if result.source.streamed else "JSON")
        if result.kind == EMPTY:
            counts.note = EMPTY_NOTE
            return
        if result.kind == FILE and result.line is None and result.findings:
            counts.note = FILE_NOTES.get(result.findings[0].code, "")
        record_rows = list(rows(result))
        counts.records += 1
        seen: set[tuple[Key, tuple[str, str]]] = set()
        for row in record_rows:
            self._count(row, counts, seen)
        errors = [r for r in record_rows if r.finding.severity is Severity.ERROR]
        if not errors:
            for row in record_rows:
                self._sample(row)
            return
        counts.failed += 1
        self.failed += 1
        anchor = f"r{self.failed}"
        self._write_record(name, record_rows, anchor)
        for row in record_rows:
            if row.finding.severity is Severity.ERROR:
                self._code_file(row).write(code_row(row, anchor))
            else:
                self._sample(row, anchor)

    def _count(self, row: Row, counts: FileCounts, seen: set[tuple[Key, tuple[str, str]]]) -> None:
        f = row.finding
        key = (f.code, f.severity)
        c = self.codes.get(key)
        if c is None:
            c = self.codes[key] = CodeCounts()
        rule = (f.rule, f.allowed or "")
        if rule not in c.rules and len(c.rules) >= RULES_PER_CODE:
            rule = OTHER_RULES
        c.findings += 1
        c.rules[rule] += 1
        if f.source and rule not in c.sources:
            c.sources[rule] = f.source
        if (key, ("", "")) not in seen:
            seen.add((key, ("", "")))
            c.records += 1
        if (key, rule) not in seen:
            seen.add((key, rule))
            c.rule_records[rule] += 1
        if f.severity is Severity.ERROR:
            counts.errors += 1
        elif f.severity is Severity.WARNING:
            counts.warnings += 1
        else:
            counts.information += 1

    def _sample(self, row: Row, anchor: str | None = None) -> None:
        key = (row.finding.code, row.finding.severity)
        shown = self._samples.setdefault(key, [])
        if len(shown) < SAMPLE_ROWS:
            shown.append(code_row(row, anchor))

    def _code_file(self, row: Row) -> TextIO:
        key = (row.finding.code, row.finding.severity)
        out = self._error_rows.get(key)
        if out is None:
            out = self._error_rows[key] = self._temp()
        return out

    def _write_record(self, name: str, record_rows: list[Row], anchor: str) -> None:
        """A record's findings, errors first; a new file opens a new group, and a chunk ends
        only between records, so a record's rows stay together."""
        write = self._errors.write
        if name != self._file_open:
            if self._file_open is not None:
                write(TABLE_END + "</section>\n")
            self._file_open = name
            write(
                f'<section class="file" data-file="{e(name)}"><h3>{e(name)}</h3>\n'
                + table_start("errors", ERROR_HEADINGS)
            )
            self._chunk = 0
        elif self._chunk >= CHUNK_ROWS:
            write(TABLE_END + table_start("errors", ERROR_HEADINGS))
            self._chunk = 0
        ordered = sorted(record_rows, key=lambda r: r.finding.severity is not Severity.ERROR)
        write('<tbody class="record">')
        for i, row in enumerate(ordered):
            write(error_row(row, i == 0, anchor, len(ordered)))
        write("</tbody>\n")
        self._chunk += len(ordered)

    def commit(self, run: RunInfo) -> None:
        """Write the header and tables, copy the rows after them, and rename."""
        out = self._file.text()
        ordered = ranked(self.codes)
        out.write(self._head(run, ordered))
        out.write(
            '<section id="errors" aria-labelledby="errors-h">'
            f'<h2 id="errors-h">Records with errors ({self.failed:,})</h2>\n'
        )
        if self.failed:
            self._errors.write(TABLE_END + "</section>\n")
            self._errors.seek(0)
            shutil.copyfileobj(self._errors, out, 1 << 20)
        else:
            out.write("<p>No record has an error.</p>\n")
        out.write("</section>\n")
        out.write(
            '<section id="files" aria-labelledby="files-h"><h2 id="files-h">Files</h2>\n'
            + files_table(self.files, run.skipped)
            + "</section>\n"
        )
        out.write(
            '<section id="summary" aria-labelledby="summary-h"><h2 id="summary-h">By code '
            "and rule</h2>\n" + summary_table(ordered, run.tally.records) + "</section>\n"
            '<section id="chart" aria-labelledby="chart-h"><h2 id="chart-h">Most common '
            "findings</h2>\n" + chart(self.codes) + "</section>\n"
        )
        out.write(
            '<section id="codes" aria-labelledby="codes-h"><h2 id="codes-h">Findings by code</h2>\n'
        )
        for index, (key, c) in enumerate(ordered):
            self._code_section(out, index, key, c)
        if not ordered:
            out.write("<p>No findings.</p>\n")
        out.write(_TAIL.format(caution=e(CAUTION)))
        self._file.commit()
        self._close()

    def _code_section(self, out: TextIO, index: int, key: Key, c: CodeCounts) -> None:
        rows_file = self._error_rows.get(key)
        shown = c.findings if rows_file is not None else len(self._samples.get(key, []))
        out.write(code_heading(index, key, c, shown))
        start = table_start("code-rows", CODE_HEADINGS) + "<tbody>\n"
        end = "</tbody>" + TABLE_END
        out.write(start)
        if rows_file is not None:
            rows_file.seek(0)
            for count, line in enumerate(rows_file):
                if count and count % CHUNK_ROWS == 0:
                    out.write(end + start)
                out.write(line)
        else:
            out.writelines(self._samples.get(key, []))
        out.write(end + "</section>\n")

    def discard(self) -> None:
        """Drop every temporary file."""
        self._close()
        self._file.discard()

    def _close(self) -> None:
        for handle in self._temps:
            handle.close()
        self._temps.clear()

    def _head(self, run: RunInfo, ordered: list[tuple[Key, CodeCounts]]) -> str:
        t = run.tally
        shown = ", ".join(e(name) for name in run.inputs[:SHOWN_INPUTS])
        if len(run.inputs) > SHOWN_INPUTS:
            shown += f" and {len(run.inputs) - SHOWN_INPUTS:,} more"
        counts = "".join(
            f'<tr><th scope="row">{label}</th><td class="n" id="count-{key}">{n(value)}</td></tr>'
            for key, label, value in (
                ("records", "Records checked", t.records),
                ("passed", "Records without errors", t.passed),
                ("failed", "Records with errors", t.failed),
                ("errors", "Errors", t.errors),
                ("warnings", "Warnings", t.warnings),
                ("information", "Information", t.information),
                ("skipped", "Files skipped in folders", len(run.skipped)),
                ("empty", "Empty files", len(t.empty)),
            )
        )
        return _HEAD.format(
            style=STYLE,
            title=e(f"capnote check report: {t.records:,} records, {t.failed:,} with errors"),
            caution=e(CAUTION),
            inputs=shown,
            files=f"{run.files:,}",
            started=e(run.started.isoformat(timespec="seconds")),
            as_at=e(run.as_at.isoformat(timespec="seconds")),
            policy=e(run.policy),
            version=e(run.version),
            counts=counts,
        )


_HEAD = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="default-src 'none'; style-src 'unsafe-inline'">
<meta name="generator" content="capnote {version}">
<title>{title}</title>
<style>{style}</style>
</head>
<body>
<header>
<h1>capnote check report</h1>
<p class="caution" role="note">{caution}</p>
<dl class="run">
<dt>Checked</dt><dd id="inputs">{inputs}</dd>
<dt>Files read</dt><dd id="files-read">{files}</dd>
<dt>Run at</dt><dd>{started}</dd>
<dt>Rules applied as at</dt><dd>{as_at}</dd>
<dt>Policy</dt><dd>{policy}</dd>
<dt>capnote</dt><dd>{version}</dd>
</dl>
<table class="counts" id="counts"><caption>Counts</caption><tbody>{counts}</tbody></table>
<nav aria-label="Sections"><a href="#errors">Records with errors</a> <a href="#files">Files</a>
<a href="#summary">By code and rule</a> <a href="#chart">Most common</a>
<a href="#codes">Findings by code</a></nav>
</header>
<main>
"""

_TAIL = """</section>
</main>
<footer><p class="caution">{caution}</p></footer>
</body>
</html>
"""
