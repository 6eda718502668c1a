"""The HTML report's look: its style sheet and the columns of the table of findings.

Kept apart from report_html so that the page's logic reads without 100 lines of CSS.
Colours are dark enough for WCAG AA contrast on white, and severity is always written out
as a word too, never shown by colour alone.
"""

from __future__ import annotations

# Rows per table chunk: small enough that a chunk lays out quickly, large enough that the
# repeated column headings do not crowd the page.
CHUNK_ROWS = 200

# (heading, width): one colgroup for every chunk, so the columns line up down the page.
_COLUMNS = (
    ("File", "13%"),
    ("Line", "5%"),
    ("Location", "14%"),
    ("Severity", "7%"),
    ("Code", "11%"),
    ("Message", "21%"),
    ("Allowed", "11%"),
    ("Source", "18%"),
)
COLUMNS = tuple(heading for heading, _width in _COLUMNS)
COLGROUP = "<colgroup>" + "".join(f'<col style="width:{w}">' for _h, w in _COLUMNS) + "</colgroup>"

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
table.counts td { font-size: 1.2rem; font-weight: 600; min-width: 7rem; }
table.summary { width: 100%; }
.sev { font-weight: 600; }
tr.error .sev { color: var(--error); }
tr.warning .sev { color: var(--warning); }
tr.information .sev { color: var(--information); }
tr.error td:first-child { box-shadow: inset 3px 0 var(--error); }
tr.warning td:first-child { box-shadow: inset 3px 0 var(--warning); }
tr.information td:first-child { box-shadow: inset 3px 0 var(--information); }
svg.chart { max-width: 100%; height: auto; }
svg.chart text { font: 13px system-ui, "Segoe UI", Roboto, Arial, sans-serif; fill: #1a1a1a; }
svg.chart .error rect { fill: var(--error); }
svg.chart .warning rect { fill: var(--warning); }
svg.chart .information rect { fill: var(--information); }
.hint { color: #444; }
.rows { width: 100%; table-layout: fixed; font-size: 13px; }
.rows td { overflow-wrap: anywhere; }
.rows thead th { position: sticky; top: 0; z-index: 1; }
.chunk { content-visibility: auto; contain-intrinsic-size: auto 7000px; }
footer { margin-top: 2rem; }
@media print {
  .chunk { content-visibility: visible; }
  .rows thead th { position: static; }
  nav { display: none; }
}
"""
