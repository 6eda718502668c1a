"""The HTML report: one self-contained page (inline CSS and SVG, no scripts, nothing fetched).

Rows are written to an unnamed temporary file beside the target while results pass, and only
counters per (code, severity) stay in memory; at commit the header, the summary table and the
chart (which need the final counts) are written, then the rows are copied after them.
"""

from __future__ import annotations

import shutil
import tempfile
from collections import Counter
from html import escape
from pathlib import Path

from capnote.batch.checking import RecordResult
from capnote.batch.output import AtomicFile, RunInfo, rows
from capnote.batch.report_style import CHUNK_ROWS, COLGROUP, COLUMNS, STYLE
from capnote.findings import Severity
from capnote.plain_text import CAUTION

TOP_FINDINGS = 12
_ORDER = {Severity.ERROR: 0, Severity.WARNING: 1, Severity.INFORMATION: 2}
_SHOWN_INPUTS = 20  # a long command line is cut in the header; every file is in the rows


def _e(text: object) -> str:
    """Text made safe for HTML content and attribute values (findings echo the input)."""
    return escape(str(text), quote=True)


def _n(count: int) -> str:
    return f'<span data-value="{count}">{count:,}</span>'


Key = tuple[str, Severity]


class HtmlReport:
    """A report page built in two passes over constant memory."""

    def __init__(self, target: Path) -> None:
        self.target = target
        self._file = AtomicFile(target)
        try:
            # Unnamed (deleted on close, and by the kernel if the process dies), in the
            # target's folder rather than /tmp, which may be small or in memory. It stays open
            # across add() calls, so no with-block: commit() and discard() close it.
            self._rows = tempfile.TemporaryFile(  # noqa: SIM115
                "w+", encoding="utf-8", newline="", dir=target.parent, prefix=".capnote-rows-"
            )
        except BaseException:
            self._file.discard()
            raise
        self.findings: Counter[Key] = Counter()
        self.records_with: Counter[Key] = Counter()
        # One rule text per code: bounded by the number of codes, not by the input.
        self.rules: dict[str, str] = {}
        self.written = 0

    def add(self, result: RecordResult) -> None:
        """Count the result's findings and write a table row for each."""
        seen: set[Key] = set()
        write = self._rows.write
        for row in rows(result):
            f = row.finding
            key = (f.code, f.severity)
            self.findings[key] += 1
            if key not in seen:
                seen.add(key)
                self.records_with[key] += 1
            self.rules.setdefault(f.code, f.rule)
            if self.written % CHUNK_ROWS == 0:
                write(_chunk_end() if self.written else "")
                write(_chunk_start())
            self.written += 1
            line = "-" if row.line is None else str(row.line)
            write(
                f'<tr class="{f.severity.value}"><td>{_e(row.file)}</td><td class="n">{line}</td>'
                f"<td><code>{_e(f.location or '(payload)')}</code></td>"
                f'<td class="sev">{f.severity.value}</td><td><code>{_e(f.code)}</code></td>'
                f"<td>{_e(f.message)}</td><td>{_e(f.allowed or '')}</td>"
                f"<td>{_e(f.source or '')}</td></tr>\n"
            )

    def commit(self, run: RunInfo) -> None:
        """Write the header, summary and chart, copy the rows after them, and rename."""
        out = self._file.text()
        out.write(self._head(run))
        if self.written:
            self._rows.write(_chunk_end())
            self._rows.seek(0)
            shutil.copyfileobj(self._rows, out, 1 << 20)
        else:
            out.write("<p>No findings.</p>\n")
        out.write(_TAIL.format(caution=_e(CAUTION)))
        self._file.commit()
        self._rows.close()

    def discard(self) -> None:
        """Drop both temporary files."""
        self._rows.close()
        self._file.discard()

    def _head(self, run: RunInfo) -> str:
        t = run.tally
        shown = ", ".join(_e(name) for name in run.inputs[:_SHOWN_INPUTS])
        if len(run.inputs) > _SHOWN_INPUTS:
            shown += f" and {len(run.inputs) - _SHOWN_INPUTS:,} more"
        counts = "".join(
            f'<tr><th scope="row">{label}</th><td class="n" id="count-{key}">{_n(value)}</td></tr>'
            for key, label, value in (
                ("records", "Records checked", t.records),
                ("passed", "Records without errors", t.passed),
                ("failed", "Records with errors", t.failed),
                ("errors", "Errors", t.errors),
                ("warnings", "Warnings", t.warnings),
                ("information", "Information", t.information),
            )
        )
        return _HEAD.format(
            style=STYLE,
            title=_e(f"capnote check report: {t.records:,} records, {t.failed:,} with errors"),
            caution=_e(CAUTION),
            inputs=shown,
            files=f"{run.files:,}",
            started=_e(run.started.isoformat(timespec="seconds")),
            as_at=_e(run.as_at.isoformat(timespec="seconds")),
            policy=_e(run.policy),
            version=_e(run.version),
            counts=counts,
            summary=self._summary(t.records),
            chart=self._chart(),
            total=f"{self.written:,}",
        )

    def _ranked(self) -> list[tuple[Key, int]]:
        return sorted(self.findings.items(), key=lambda kv: (-kv[1], _ORDER[kv[0][1]], kv[0][0]))

    def _summary(self, records: int) -> str:
        if not self.findings:
            return "<p>No findings.</p>"
        body = []
        ordered = sorted(self.findings.items(), key=lambda kv: (_ORDER[kv[0][1]], -kv[1], kv[0][0]))
        for (code, severity), count in ordered:
            affected = self.records_with[(code, severity)]
            share = f"{100 * affected / records:.1f}%" if records else "-"
            body.append(
                f'<tr class="{severity.value}" data-code="{_e(code)}" '
                f'data-severity="{severity.value}"><td class="sev">{severity.value}</td>'
                f'<td><code>{_e(code)}</code></td><td class="n">{_n(count)}</td>'
                f'<td class="n">{_n(affected)}</td><td class="n">{share}</td>'
                f"<td>{_e(self.rules.get(code, ''))}</td></tr>"
            )
        return (
            '<table class="summary" id="by-code"><caption>Findings by severity and code; a '
            "record can have a code more than once.</caption><thead><tr>"
            '<th scope="col">Severity</th><th scope="col">Code</th>'
            '<th scope="col" class="n">Findings</th><th scope="col" class="n">Records</th>'
            '<th scope="col" class="n">Share of records</th><th scope="col">Rule</th></tr>'
            "</thead><tbody>" + "\n".join(body) + "</tbody></table>"
        )

    def _chart(self) -> str:
        top = self._ranked()[:TOP_FINDINGS]
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
            + _e("; ".join(f"{code} ({sev.value}) {n:,}" for (code, sev), n in top))
            + "</desc>"
        ]
        for i, ((code, severity), count) in enumerate(top):
            y = pad + i * row_h
            w = max(1.0, bar_w * count / most)
            label = _e(f"{code} ({severity.value})")
            parts.append(
                f'<g class="bar {severity.value}" data-code="{_e(code)}">'
                f'<text x="{label_w - 8}" y="{y + bar_h - 4}" text-anchor="end">{label}</text>'
                f'<rect x="{label_w}" y="{y}" width="{w:.1f}" height="{bar_h}">'
                f"<title>{label}: {count:,}</title></rect>"
                f'<text x="{label_w + w + 6:.1f}" y="{y + bar_h - 4}">{count:,}</text></g>'
            )
        parts.append("</svg>")
        return "".join(parts)


def _chunk_start() -> str:
    # Rows come in tables of CHUNK_ROWS so that the browser lays out only the chunks in view
    # (content-visibility); a fixed layout and one colgroup keep the columns aligned.
    head = "".join(f'<th scope="col">{label}</th>' for label in COLUMNS)
    return (
        f'<div class="chunk"><table class="rows">{COLGROUP}<thead><tr>{head}</tr></thead><tbody>\n'
    )


def _chunk_end() -> str:
    return "</tbody></table></div>\n"


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
<dt>Files read</dt><dd id="files">{files}</dd>
<dt>Run at</dt><dd>{started}</dd>
<dt>Rules applied as at</dt><dd>{as_at}</dd>
<dt>Policy</dt><dd>{policy}</dd>
<dt>capnote</dt><dd>{version}</dd>
</dl>
<table class="counts" id="counts"><caption>Counts</caption><tbody>{counts}</tbody></table>
<nav aria-label="Sections"><a href="#summary">By code and severity</a>
<a href="#chart">Most common</a> <a href="#problems">Every finding</a></nav>
</header>
<main>
<section id="summary" aria-labelledby="summary-h"><h2 id="summary-h">By code and severity</h2>
{summary}
</section>
<section id="chart" aria-labelledby="chart-h"><h2 id="chart-h">Most common findings</h2>
{chart}
</section>
<section id="problems" aria-labelledby="problems-h">
<h2 id="problems-h">Every finding ({total})</h2>
<p class="hint">Line "-" is a whole JSON file; the location is a path into the record.</p>
"""

_TAIL = """</section>
</main>
<footer><p class="caution">{caution}</p></footer>
</body>
</html>
"""
