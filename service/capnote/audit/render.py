"""The audit report as one self-contained HTML page (SVG funnel plots, each with a text
table beside it) or as CSV. Every value written is escaped; counts under 5 are marked."""

from __future__ import annotations

import csv
import io
from html import escape

from capnote.audit.report import (
    CAUTION,
    ENERGY_BANDS_SOURCE,
    FUNNELS,
    PROPHYLAXIS_SOURCE,
    PUBLISHED_ENERGY,
    RATE_LABELS,
    REVIEW_LABELS,
    REVIEW_SOURCE,
    SPIKE_SOURCE,
    Figures,
    Placed,
    Report,
    Unit,
)
from capnote.audit.stats import SMALL_COUNT, Rate, funnel_limits

SMALL_MARK = f"under {SMALL_COUNT}"


def _pct(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.1f}%"


def rate_text(r: Rate) -> str:
    """ "12/340 = 3.5% (95% CI 2.0% to 6.1%)", marked when a count is under 5."""
    if not r.total:
        return "0/0 (no denominator)"
    text = f"{r.count}/{r.total} = {_pct(r.value)} (95% CI {_pct(r.low)} to {_pct(r.high)})"
    return text + (f" [{SMALL_MARK}]" if r.small else "")


def _quartiles(q: tuple[float, float, float] | None, unit: str) -> str:
    if q is None:
        return "-"
    return f"median {q[1]:.1f} {unit} (IQR {q[0]:.1f} to {q[2]:.1f})"


def _who(f: Figures) -> str:
    return f"{f.name} ({f.key})" if f.key else f.name


# --- HTML ----------------------------------------------------------------------------------

STYLE = """
body{font-family:system-ui,sans-serif;margin:1.5rem;max-width:80rem;color:#1b1b1b}
.caution{border:2px solid #8a5a00;background:#fff6e0;padding:.6rem 1rem;font-weight:600}
table{border-collapse:collapse;margin:.5rem 0 1rem}td,th{border:1px solid #999;padding:.2rem .5rem;
text-align:left;vertical-align:top}.small{background:#eee;font-style:italic}
.pair{display:flex;gap:1.5rem;flex-wrap:wrap;align-items:flex-start}.pair table{max-width:38rem}
"""


def _figures_table(rows: list[Figures]) -> str:
    head = (
        "<tr><th>who</th><th>sessions</th><th>eyes</th><th>total energy per session</th>"
        + "".join(f"<th>{escape(label)}</th>" for label in RATE_LABELS.values())
        + "<th>days from cataract surgery</th><th>glaucoma not recorded</th></tr>"
    )
    body = []
    for f in rows:
        cells = [
            escape(_who(f)),
            str(f.sessions) + (f" [{SMALL_MARK}]" if f.sessions < SMALL_COUNT else ""),
            str(f.eyes),
            escape(
                _quartiles(f.energy_quartiles, "mJ")
                + ("" if f.energy_mean is None else f"; mean {f.energy_mean:.1f} mJ")
            ),
        ]
        for name in RATE_LABELS:
            r = f.rates[name]
            cls = ' class="small"' if r.small else ""
            cells.append(f"<span{cls}>{escape(rate_text(r))}</span>")
        cells.append(escape(_quartiles(f.cataract_days, "days") + f" (n={f.cataract_n})"))
        cells.append(str(f.glaucoma_unrecorded))
        body.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return f"<table>{head}{''.join(body)}</table>"


def _reviews_table(rows: list[Figures]) -> str:
    """What the review visits say, one row per unit or clinician."""
    head = (
        "<tr><th>who</th>"
        + "".join(f"<th>{escape(label)}</th>" for label, _ in REVIEW_LABELS.values())
        + "<th>booked, no signed review yet</th></tr>"
    )
    body = []
    for f in rows:
        cells = [escape(_who(f))]
        for name in REVIEW_LABELS:
            r = f.review_rates[name]
            cls = ' class="small"' if r.small else ""
            cells.append(f"<span{cls}>{escape(rate_text(r))}</span>")
        cells.append(str(f.reviews_awaited))
        body.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return f"<table>{head}{''.join(body)}</table>"


def funnel_svg(unit: Figures, placed: tuple[Placed, ...], measure: str, title: str) -> str:
    """A funnel plot: the unit's rate, its 95% and 99.8% limits over the denominator, and a
    labelled point per clinician."""
    target = unit.rates[measure].value
    points = [(p, p.clinician.rates[measure]) for p in placed if p.clinician.rates[measure].total]
    if target is None or not points:
        return "<p>No funnel: no denominator.</p>"
    width, height, left, bottom, top, right = 640, 320, 56, 40, 20, 150
    n_max = max(max(r.total for _, r in points), 10) * 1.1
    # Tall enough for every point and for the limits from a quarter of the smallest
    # clinician's denominator on: the funnel's mouth at n = 1 would flatten the rest.
    near_n = max(5, min(r.total for _, r in points) // 4)
    y_max = max(max(r.value or 0 for _, r in points), funnel_limits(target, near_n).high998)
    y_max = min(1.0, y_max * 1.1 + 0.01)

    def x(n: float) -> float:
        return left + (width - left - right) * n / n_max

    def y(p: float) -> float:
        return height - bottom - (height - bottom - top) * p / y_max

    steps = [near_n + (n_max - near_n) * i / 60 for i in range(61)]
    lines = []
    for attr, dash in (("high95", "6 3"), ("low95", "6 3"), ("high998", "2 2"), ("low998", "2 2")):
        limit = [getattr(funnel_limits(target, max(1, round(n))), attr) for n in steps]
        coords = " ".join(
            f"{x(n):.1f},{y(min(y_max, v)):.1f}" for n, v in zip(steps, limit, strict=True)
        )
        lines.append(
            f'<polyline points="{coords}" fill="none" stroke="#555" stroke-dasharray="{dash}"/>'
        )
    marks = []
    for p, r in points:
        colour = "#b00020" if p.where.startswith("above") else "#0b5394"
        label = escape(p.clinician.name)
        marks.append(
            f'<circle cx="{x(r.total):.1f}" cy="{y(r.value or 0):.1f}" r="5" fill="{colour}">'
            f"<title>{label}: {escape(rate_text(r))}</title></circle>"
            f'<text x="{x(r.total) + 7:.1f}" y="{y(r.value or 0) - 6:.1f}" font-size="11">'
            f"{label}</text>"
        )
    ticks = "".join(
        f'<text x="{left - 6}" y="{y(y_max * i / 4) + 4:.1f}" font-size="10" text-anchor="end">'
        f"{100 * y_max * i / 4:.0f}%</text>"
        for i in range(5)
    )
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
        f'role="img" aria-label="{escape(title)}">'
        f"<title>{escape(title)}</title>"
        f'<line x1="{left}" y1="{height - bottom}" x2="{width - right}" y2="{height - bottom}" '
        f'stroke="#000"/><line x1="{left}" y1="{top}" x2="{left}" y2="{height - bottom}" '
        f'stroke="#000"/>{ticks}'
        f'<text x="{(width + left) / 2}" y="{height - 8}" font-size="11" text-anchor="middle">'
        f"sessions with the measure recorded (denominator; axis to {n_max:.0f})</text>"
        f'<text x="{left + 8}" y="{top + 4}" font-size="10">line: unit rate; dashed: 95% '
        "limits; dotted: 99.8% limits</text>"
        f'<line x1="{x(0)}" y1="{y(target):.1f}" x2="{x(n_max)}" y2="{y(target):.1f}" '
        f'stroke="#000"/>{"".join(lines)}{"".join(marks)}</svg>'
    )


def _funnel_table(unit: Figures, placed: tuple[Placed, ...], measure: str) -> str:
    rows = []
    for p in placed:
        r = p.clinician.rates[measure]
        limits = funnel_limits(unit.rates[measure].value or 0.0, r.total) if r.total else None
        span = (
            "-"
            if limits is None
            else f"95%: {_pct(limits.low95)} to {_pct(limits.high95)}; "
            f"99.8%: {_pct(limits.low998)} to {_pct(limits.high998)}"
        )
        rows.append(
            f"<tr><td>{escape(_who(p.clinician))}</td><td>{escape(rate_text(r))}</td>"
            f"<td>{escape(span)}</td><td>{escape(p.where)}</td></tr>"
        )
    return (
        "<table><tr><th>clinician</th><th>rate</th><th>control limits at this denominator</th>"
        f"<th>on the funnel</th></tr>{''.join(rows)}</table>"
    )


def _unit_html(u: Unit) -> str:
    f = u.figures
    parts = [
        f"<h2>Unit: {escape(_who(f))}</h2>",
        _figures_table([f, *u.clinicians]),
        "<h3>Review visits</h3>",
        _reviews_table([f, *u.clinicians]),
    ]
    for measure, title in FUNNELS:
        label = f"{title}: clinicians against the unit's {rate_text(f.rates[measure])}"
        parts.append(
            f'<h3>Funnel plot: {escape(label)}</h3><div class="pair">'
            f"{funnel_svg(f, u.funnels[measure], measure, label)}"
            f"{_funnel_table(f, u.funnels[measure], measure)}</div>"
        )
    return "<section>" + "".join(parts) + "</section>"


def html_page(report: Report) -> str:
    """The whole report as one HTML page."""
    caution = f'<p class="caution" role="note">{escape(CAUTION)}</p>'
    scope = f"{report.start:%Y-%m-%d} to {report.end:%Y-%m-%d}"
    if report.site:
        scope += f", unit {report.site}"
    if report.clinician:
        scope += f", clinician {report.clinician}"
    published = "".join(
        f"<tr><td>{escape(source)}</td><td>{escape(value)}</td></tr>"
        for source, value in PUBLISHED_ENERGY
    )
    local = (
        _quartiles(report.everyone.energy_quartiles, "mJ")
        + (
            ""
            if report.everyone.energy_mean is None
            else f"; mean {report.everyone.energy_mean:.1f} mJ"
        )
        if report.everyone
        else "-"
    )
    everyone = report.everyone
    reviews = "".join(
        f"<tr><td>{escape(label)}</td>"
        f"<td>{escape(rate_text(everyone.review_rates[name])) if everyone else '-'}</td>"
        f"<td>{escape(source or '-')}</td></tr>"
        for name, (label, source) in REVIEW_LABELS.items()
    )
    awaited = everyone.reviews_awaited if everyone else 0
    body = [
        caution,
        f"<h1>Clinical audit of laser capsulotomy sessions, {escape(scope)}</h1>",
        "<p>Final sessions only (the newest version of each note; drafts and voided notes "
        f"are left out). Counts under {SMALL_COUNT} are marked [{SMALL_MARK}], not hidden.</p>",
        "<h2>All units together</h2>",
        _figures_table([report.everyone]) if report.everyone else "<p>No sessions.</p>",
        "<h2>Total energy per session against published series</h2>",
        f"<table><tr><th>series</th><th>total energy</th></tr>{published}"
        f"<tr><td>this audit (all units)</td><td>{escape(local)}</td></tr></table>",
        f"<p>{escape(ENERGY_BANDS_SOURCE)}. {escape(SPIKE_SOURCE)} "
        f"{escape(PROPHYLAXIS_SOURCE)}.</p>",
        "<h2>After the session: the review visits</h2><table><tr><th>item</th>"
        f"<th>this audit (all units)</th><th>published series</th></tr>{reviews}</table>",
        f"<p>Booked reviews with no signed review record yet: {awaited}. "
        f"{escape(REVIEW_SOURCE)}</p>",
        *(_unit_html(u) for u in report.units),
        caution,
    ]
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        "<title>capnote clinical audit</title>"
        f"<style>{STYLE}</style></head><body>{''.join(body)}</body></html>"
    )


# --- CSV -----------------------------------------------------------------------------------

CSV_HEADER = (
    "unit",
    "clinician",
    "measure",
    "count",
    "denominator",
    "value",
    "ci95_low",
    "ci95_high",
    "under_5",
    "funnel",
    "note",
)


def csv_text(report: Report) -> str:
    """One row per rate and figure; the caution as the first and last rows."""
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(CSV_HEADER)
    w.writerow(["", "", "caution", "", "", "", "", "", "", "", CAUTION])

    def rows(unit: str, clinician: str, f: Figures, where: dict[str, str]) -> None:
        w.writerow(
            [unit, clinician, "sessions", f.sessions, "", "", "", "", f.sessions < 5, "", ""]
        )
        w.writerow([unit, clinician, "eyes", f.eyes, "", "", "", "", f.eyes < 5, "", ""])
        if f.energy_quartiles:
            q1, med, q3 = f.energy_quartiles
            w.writerow(
                [
                    unit,
                    clinician,
                    "total energy median mJ",
                    "",
                    "",
                    f"{med:.3f}",
                    "",
                    "",
                    "",
                    "",
                    f"IQR {q1:.3f} to {q3:.3f}",
                ]
            )
        for name, label in RATE_LABELS.items():
            r = f.rates[name]
            w.writerow(
                [
                    unit,
                    clinician,
                    label,
                    r.count,
                    r.total,
                    "" if r.value is None else f"{r.value:.6f}",
                    "" if r.low is None else f"{r.low:.6f}",
                    "" if r.high is None else f"{r.high:.6f}",
                    r.small,
                    where.get(name, ""),
                    "",
                ]
            )
        for name, (label, source) in REVIEW_LABELS.items():
            r = f.review_rates[name]
            w.writerow(
                [
                    unit,
                    clinician,
                    label,
                    r.count,
                    r.total,
                    "" if r.value is None else f"{r.value:.6f}",
                    "" if r.low is None else f"{r.low:.6f}",
                    "" if r.high is None else f"{r.high:.6f}",
                    r.small,
                    "",
                    f"published: {source}" if source else "",
                ]
            )
        w.writerow(
            [unit, clinician, "booked reviews with no signed review yet", f.reviews_awaited]
            + [""] * 7
        )
        if f.cataract_days:
            q1, med, q3 = f.cataract_days
            w.writerow(
                [
                    unit,
                    clinician,
                    "days from cataract surgery median",
                    "",
                    f.cataract_n,
                    f"{med:.1f}",
                    "",
                    "",
                    f.cataract_n < 5,
                    "",
                    f"IQR {q1:.1f} to {q3:.1f}",
                ]
            )

    if report.everyone:
        rows("all", "", report.everyone, {})
    for u in report.units:
        rows(u.figures.key, "", u.figures, {})
        for c in u.clinicians:
            where = {
                m: p.where for m, placed in u.funnels.items() for p in placed if p.clinician is c
            }
            rows(u.figures.key, c.key, c, where)
    w.writerow(["", "", "caution", "", "", "", "", "", "", "", CAUTION])
    return out.getvalue()
