"""The HTML report's look: its style sheet and the columns of the table of findings.

Kept apart from report_html so that the page's logic reads without 100 lines of CSS.
Column widths hang on the header cells of each table (its first row), which a fixed table
layout reads alone, so every chunk lines up without a colgroup in each.
Colours are dark enough for WCAG AA contrast on white, and severity is always written out
as a word too, never shown by colour alone.
"""

from __future__ import annotations

# Rows per table chunk: small enough that a chunk lays out quickly, large enough that the
# repeated column headings do not crowd the page.
CHUNK_ROWS = 200

STYLE = """
:root { color-scheme: light; --error: #a3001b; --warning: #7a4a00; --information: #1d4f8c;
  --rule: #d4d4d4; --soft: #f4f4f4; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, "Segoe UI", Roboto, Arial, sans-serif; color: #1a1a1a;
  background: #fff; margin: 0 auto; max-width: 1500px; padding: 1rem 1.5rem 3rem; }
h1 { font-size: 1.5rem; margin: .3rem 0 .7rem; }
h2 { font-size: 1.15rem; margin: 2rem 0 .6rem; }
code { font: 12.5px/1.4 ui-monospace, "Cascadia Mono", Menlo, Consolas, monospace; }
.caution { border-left: 4px solid var(--warning); background: #fff5e3; padding: .5rem .8rem;
  margin: .5rem 0 1rem; }
dl.run { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1rem; margin: 0; }
dl.run dt { font-weight: 600; }
dl.run dd { margin: 0; overflow-wrap: anywhere; }
nav { margin: 1rem 0 0; display: flex; gap: 1.2rem; }
table { border-collapse: collapse; }
caption { text-align: left; font-weight: 600; padding: .2rem 0 .4rem; }
th, td { text-align: left; vertical-align: top; padding: .25rem .5rem;
  border-bottom: 1px solid var(--rule); }
thead th { background: var(--soft); }
.n { text-align: right; font-variant-numeric: tabular-nums; }
table.counts { margin-top: 1rem; }
table.counts tbody { display: flex; flex-wrap: wrap; gap: .5rem; }
table.counts tr { display: flex; flex-direction: column-reverse; min-width: 7.5rem;
  border: 1px solid var(--rule); border-radius: 4px; padding: .3rem .7rem; }
table.counts th, table.counts td { border: 0; padding: 0; text-align: left; }
table.counts th { font-weight: normal; color: #333; }
table.counts td { font-size: 1.3rem; font-weight: 600; }
table.summary { width: 100%; }
.sev { font-weight: 600; }
tr.error .sev { color: var(--error); }
tr.warning .sev { color: var(--warning); }
tr.information .sev { color: var(--information); }
tr.error > :first-child { box-shadow: inset 3px 0 var(--error); }
tr.warning > :first-child { box-shadow: inset 3px 0 var(--warning); }
tr.information > :first-child { box-shadow: inset 3px 0 var(--information); }
svg.chart { max-width: 100%; height: auto; }
svg.chart text { font: 13px system-ui, "Segoe UI", Roboto, Arial, sans-serif; fill: #1a1a1a; }
svg.chart .error rect { fill: var(--error); }
svg.chart .warning rect { fill: var(--warning); }
svg.chart .information rect { fill: var(--information); }
.hint { color: #444; }
a { color: #0b4f9c; }
table.files { margin-bottom: 1rem; }
table.files th[scope="row"] { font-weight: normal; overflow-wrap: anywhere; }
section.file h3 { font-size: 1rem; margin: 1.2rem 0 .3rem; overflow-wrap: anywhere; }
section.code h3 { font-size: 1rem; margin: 1.4rem 0 .2rem; }
.rows { width: 100%; table-layout: fixed; font-size: 13px; }
.rows td, .rows th { overflow-wrap: anywhere; }
.rows tbody th { font-weight: normal; background: var(--soft); }
.rows thead th { position: sticky; top: 0; z-index: 1; }
.rows small { color: #444; }
.errors th:nth-child(1) { width: 12%; } .errors th:nth-child(2) { width: 8.5%; }
.errors th:nth-child(3) { width: 15%; } .errors th:nth-child(4) { width: 11%; }
.errors th:nth-child(5) { width: 24%; } .errors th:nth-child(6) { width: 18.5%; }
.code-rows th:nth-child(1) { width: 16%; } .code-rows th:nth-child(2) { width: 17%; }
.code-rows th:nth-child(3) { width: 33%; } .code-rows th:nth-child(4) { width: 12%; }
tbody.record { border-top: 2px solid #999; }
.chunk { content-visibility: auto; contain-intrinsic-size: auto 7000px; }
footer { margin-top: 2rem; }
@media print {
  .chunk { content-visibility: visible; }
  .rows thead th { position: static; }
  nav { display: none; }
}
"""
