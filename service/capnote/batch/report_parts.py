"""The HTML report's parts, as pure functions of counters: the tables of files and codes, the
chart, the header, and the rows themselves.

report_html keeps the counters and the temporary files; everything here turns values into
markup, escaping whatever the input could have put in them.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from html import escape

from capnote.batch.inputs import Skipped
from capnote.batch.output import Row
from capnote.findings import Severity

TOP_FINDINGS = 12
ORDER = {Severity.ERROR: 0, Severity.WARNING: 1, Severity.INFORMATION: 2}
SHOWN_INPUTS = 20  # a long command line is cut in the header; every file is in the table
SHOWN_SKIPPED = 1_000  # a folder of thousands of other files is counted, not listed in full

Key = tuple[str, Severity]
RuleKey = tuple[str, str]  # (rule, allowed range)


def e(text: object) -> str:
    """Text made safe for HTML content and attribute values (findings echo the input).

    Line breaks become character references, so every row the report streams is one line
    of the temporary file and a chunk can never end inside one."""
    return escape(str(text), quote=True).replace("\n", "&#10;").replace("\r", "&#13;")


def n(count: int) -> str:
    """A count, with its exact value as data for programs that read the page."""
    return f'<span data-value="{count}">{count:,}</span>'


@dataclass(slots=True)
class FileCounts:
    """One input file's counts, for the table of files."""

    kind: str  # "NDJSON" or "JSON"
    records: int = 0
    failed: int = 0
    errors: int = 0
    warnings: int = 0
    information: int = 0
    note: str = ""  # why a file gave no record of its own: empty, unreadable, too large


# A file-level finding's code -> what the table of files says about the file.
FILE_NOTES = {
    "file-unreadable": "cannot be read",
    "file-too-large": "too large to read",
    "json-holds-ndjson": "holds NDJSON: use --ndjson",
}
EMPTY_NOTE = "empty: no records"


@dataclass(slots=True)
class CodeCounts:
    """One (code, severity): findings, records, and the same split per rule.

    Rules are few per code (one per checked field at most); past RULES_PER_CODE the rest
    are counted together, so a hostile input cannot grow this without bound."""

    findings: int = 0
    records: int = 0
    rules: Counter[RuleKey] = field(default_factory=Counter)
    rule_records: Counter[RuleKey] = field(default_factory=Counter)
    sources: dict[RuleKey, str] = field(default_factory=dict)


RULES_PER_CODE = 24
OTHER_RULES: RuleKey = ("(other rules)", "")


def code_anchor(index: int) -> str:
    """The id of a code's section; codes are numbered, since a code echoes its input."""
    return f"code-{index}"


def location(text: str) -> str:
    """A finding's location cell."""
    return f"<code>{e(text or '(payload)')}</code>"


def record_cell(row: Row, anchor: str | None) -> str:
    """Where a record is, as file:line (file:- for a whole JSON file), and its identifier;
    anchor, when the record is listed among the records with errors, links there."""
    where = f"{e(row.file)}:{'-' if row.line is None else row.line}"
    if anchor is not None:
        where = f'<a href="#{anchor}">{where}</a>'
    ident = f"<br><small>{e(row.identifier)}</small>" if row.identifier else ""
    return f"{where}{ident}"


def error_row(row: Row, first: bool, anchor: str, span: int) -> str:
    """One finding of a record with errors; the record's first row carries the record cell
    (spanning its findings) and the anchor that the codes' sections link to."""
    f = row.finding
    head = ""
    if first:
        where = "whole file" if row.line is None else f"line {row.line:,}"
        ident = f"<br><small>{e(row.identifier)}</small>" if row.identifier else ""
        head = f'<th scope="rowgroup" rowspan="{span}" id="{anchor}">{where}{ident}</th>'
    return (
        f'<tr class="{f.severity.value}">{head}<td class="sev">{f.severity.value}</td>'
        f"<td>{location(f.location)}</td><td><code>{e(f.code)}</code></td>"
        f"<td>{e(f.message)}</td><td>{e(f.rule)}</td><td>{e(f.allowed or '')}</td></tr>\n"
    )


ERROR_HEADINGS = ("Record", "Severity", "Location", "Code", "Message", "Rule", "Allowed")
CODE_HEADINGS = ("Record", "Location", "Message", "Allowed", "Source")


def code_row(row: Row, anchor: str | None) -> str:
    """One finding in its code's section."""
    f = row.finding
    return (
        f'<tr class="{f.severity.value}"><td>{record_cell(row, anchor)}</td>'
        f"<td>{location(f.location)}</td><td>{e(f.message)}</td>"
        f"<td>{e(f.allowed or '')}</td><td>{e(f.source or '')}</td></tr>\n"
    )


def table_start(kind: str, headings: tuple[str, ...], caption: str = "") -> str:
    """A chunk of rows: a table the browser lays out only when it is scrolled to."""
    head = "".join(f'<th scope="col">{h}</th>' for h in headings)
    cap = f"<caption>{caption}</caption>" if caption else ""
    return f'<div class="chunk"><table class="rows {kind}">{cap}<thead><tr>{head}</tr></thead>\n'


# Rows go in tbody groups: one per record among the records with errors, one per chunk in
# a code's section.
TABLE_END = "</table></div>\n"


def files_table(files: dict[str, FileCounts], skipped: tuple[Skipped, ...]) -> str:
    """The table per file, and the list of what the folder walks skipped."""
    body = []
    for name, c in files.items():
        body.append(
            f'<tr class="file-row" data-file="{e(name)}"><th scope="row">{e(name)}</th>'
            f"<td>{c.kind}</td>"
            f'<td class="n">{n(c.records)}</td><td class="n">{n(c.failed)}</td>'
            f'<td class="n">{n(c.errors)}</td><td class="n">{n(c.warnings)}</td>'
            f'<td class="n">{n(c.information)}</td><td>{e(c.note)}</td></tr>'
        )
    table = (
        '<table class="files" id="by-file"><caption>Each input file</caption><thead><tr>'
        '<th scope="col">File</th><th scope="col">Read as</th>'
        '<th scope="col" class="n">Records</th><th scope="col" class="n">With errors</th>'
        '<th scope="col" class="n">Errors</th><th scope="col" class="n">Warnings</th>'
        '<th scope="col" class="n">Information</th><th scope="col">Note</th></tr></thead>'
        "<tbody>" + "\n".join(body) + "</tbody></table>"
    )
    if not skipped:
        return table + "<p>No file was skipped.</p>"
    items = "".join(
        f'<tr class="skipped-row"><th scope="row">{e(s.name)}</th><td>{e(s.reason)}</td></tr>'
        for s in skipped[:SHOWN_SKIPPED]
    )
    more = (
        f"<p>and {len(skipped) - SHOWN_SKIPPED:,} more.</p>" if len(skipped) > SHOWN_SKIPPED else ""
    )
    return (
        f'{table}<table class="files" id="skipped"><caption>Skipped in folders: '
        f'{n(len(skipped))}</caption><thead><tr><th scope="col">Path</th><th scope="col">Why'
        f"</th></tr></thead><tbody>{items}</tbody></table>{more}"
    )


def ranked(codes: dict[Key, CodeCounts]) -> list[tuple[Key, CodeCounts]]:
    """Codes by severity (errors first), then by count, then by name: the report's order."""
    return sorted(codes.items(), key=lambda kv: (ORDER[kv[0][1]], -kv[1].findings, kv[0][0]))


def summary_table(ordered: list[tuple[Key, CodeCounts]], records: int) -> str:
    """A row per (code, rule): how many findings and records each rule gave, each code
    linking to its section of rows."""
    if not ordered:
        return "<p>No findings.</p>"
    body = []
    for index, ((code, severity), c) in enumerate(ordered):
        rules = sorted(c.rules.items(), key=lambda kv: (-kv[1], kv[0]))
        for (rule, allowed), count in rules:
            affected = c.rule_records[(rule, allowed)]
            share = f"{100 * affected / records:.1f}%" if records else "-"
            source = c.sources.get((rule, allowed), "")
            body.append(
                f'<tr class="{severity.value}" data-code="{e(code)}" '
                f'data-severity="{severity.value}"><td class="sev">{severity.value}</td>'
                f'<td><a href="#{code_anchor(index)}"><code>{e(code)}</code></a></td>'
                f"<td>{e(rule)}</td><td>{e(allowed)}</td>"
                f'<td class="n">{n(count)}</td><td class="n">{n(affected)}</td>'
                f'<td class="n">{share}</td><td>{e(source)}</td></tr>'
            )
    return (
        '<table class="summary" id="by-code"><caption>Findings by severity, code and rule; '
        "a record can have a code more than once. Each code links to its findings.</caption>"
        '<thead><tr><th scope="col">Severity</th><th scope="col">Code</th>'
        '<th scope="col">Rule</th><th scope="col">Allowed</th>'
        '<th scope="col" class="n">Findings</th><th scope="col" class="n">Records</th>'
        '<th scope="col" class="n">Share of records</th><th scope="col">Source</th></tr>'
        "</thead><tbody>" + "\n".join(body) + "</tbody></table>"
    )


def chart(codes: dict[Key, CodeCounts]) -> str:
    """An SVG bar chart of the most common (code, severity) pairs."""
    top = sorted(
        ((key, c.findings) for key, c in codes.items()),
        key=lambda kv: (-kv[1], ORDER[kv[0][1]], kv[0][0]),
    )[:TOP_FINDINGS]
    if not top:
        return "<p>No findings to chart.</p>"
    label_w, bar_w, row_h, bar_h, pad = 330, 330, 28, 18, 8
    width, height = label_w + bar_w + 90, len(top) * row_h + 2 * pad
    most = top[0][1]
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="chart" viewBox="0 0 {width} '
        f'{height}" width="{width}" height="{height}" role="img" '
        'aria-labelledby="chart-title chart-desc">'
        '<title id="chart-title">Most common findings</title>'
        f'<desc id="chart-desc">The {len(top)} most common findings by count: '
        + e("; ".join(f"{code} ({sev.value}) {count:,}" for (code, sev), count in top))
        + "</desc>"
    ]
    for i, ((code, severity), count) in enumerate(top):
        y = pad + i * row_h
        w = max(1.0, bar_w * count / most)
        label = e(f"{code} ({severity.value})")
        parts.append(
            f'<g class="bar {severity.value}" data-code="{e(code)}">'
            f'<text x="{label_w - 8}" y="{y + bar_h - 4}" text-anchor="end">{label}</text>'
            f'<rect x="{label_w}" y="{y}" width="{w:.1f}" height="{bar_h}">'
            f"<title>{label}: {count:,}</title></rect>"
            f'<text x="{label_w + w + 6:.1f}" y="{y + bar_h - 4}">{count:,}</text></g>'
        )
    parts.append("</svg>")
    return "".join(parts)


def code_heading(index: int, key: Key, c: CodeCounts, shown: int) -> str:
    """The start of a code's section: what it is, how often, and how much is listed."""
    code, severity = key
    listed = (
        "every one is listed"
        if shown >= c.findings
        else f"the first {shown:,} are listed; the CSV report (--report FILE.csv) has all "
        f"{c.findings:,}"
    )
    return (
        f'<section class="code {severity.value}" id="{code_anchor(index)}" '
        f'data-code="{e(code)}" data-severity="{severity.value}" '
        f'aria-labelledby="{code_anchor(index)}-h"><h3 id="{code_anchor(index)}-h">'
        f"<code>{e(code)}</code> ({severity.value}): {c.findings:,} finding(s) in "
        f'{c.records:,} record(s)</h3><p class="hint">{listed}.</p>\n'
    )
