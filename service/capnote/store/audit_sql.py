"""The clinical audit's statements (capnote.audit): counts and order statistics per unit
and per clinician, aggregated in the database on both engines.

The sessions counted are the newest version of each note whose session starts in the
period and whose status is "final" (drafts, voids and drafts kept as typed are left out).

Medians and quartiles: SQLite has no percentile aggregate, so both engines run the same
window query: each value's row number within its group, and the group's count, keeping only
the (at most six) rows either side of the 25th, 50th and 75th percentile positions; the
caller interpolates between them (capnote.audit.stats.quantile_from, Hyndman and Fan type 7).
No other row leaves the database.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Integer, and_, bindparam, case, distinct, func, literal, or_, select
from sqlalchemy.sql import ClauseElement

from capnote.audit.stats import quantile_from
from capnote.store.tables import NoteVersion, ReviewVersion

_NOTE = NoteVersion.__table__  # type: ignore[attr-defined]
_REVIEW = ReviewVersion.__table__  # type: ignore[attr-defined]
# The grouping levels: all units together, each unit, each clinician within a unit.
LEVELS: dict[str, tuple[str, ...]] = {
    "all": (),
    "unit": ("site",),
    "clinician": ("site", "performer"),
}
GLAUCOMA = ("suspect", "mild", "moderate", "advanced")
HIGH_ENERGY_MJ = 80.0  # the top band of Chawla et al., ESCRS 2014 (> 80 mJ)
COUNT_NAMES = (
    "sessions",
    "eyes",
    "energy_n",
    "energy_over_80",
    "energy_mean",
    "spike_n",
    "spike_moderate",
    "spike_severe",
    "glaucoma_n",
    "glaucoma_prophylaxis",
    "glaucoma_unrecorded",
    "cataract_n",
)


def _counted(site: bool) -> Any:
    """The newest version of each note, final, started in [start, end) (and at one unit)."""
    newest = (
        select(_NOTE.c.note_key, func.max(_NOTE.c.version).label("v"))
        .group_by(_NOTE.c.note_key)
        .subquery()
    )
    wanted = [
        _NOTE.c.started_at >= bindparam("start"),
        _NOTE.c.started_at < bindparam("end"),
        _NOTE.c.status == literal("final"),
    ]
    if site:
        wanted.append(_NOTE.c.site == bindparam("site"))
    return (
        select(_NOTE)
        .join(newest, and_(_NOTE.c.note_key == newest.c.note_key, _NOTE.c.version == newest.c.v))
        .where(*wanted)
        .subquery("s")
    )


def _flag(condition: Any) -> Any:
    return func.sum(case((condition, 1), else_=0))


def counts(level: str, site: bool) -> ClauseElement:
    """One row per group of the level: its keys, a display name for each, then COUNT_NAMES."""
    s = _counted(site)
    keys = [s.c[name] for name in LEVELS[level]]
    names = [func.max(s.c[f"{name}_name"]) for name in LEVELS[level]]
    eye = s.c.patient_system + "|" + s.c.patient_value + "|" + s.c.eye
    # One comparison per grade: an IN list would be an expanding parameter, which the
    # store's once-compiled statements do not carry.
    in_glaucoma = or_(*(s.c.glaucoma == literal(g) for g in GLAUCOMA))
    return (
        select(
            *keys,
            *names,
            func.count(),
            func.count(distinct(eye)),
            func.count(s.c.total_energy_mj),
            _flag(s.c.total_energy_mj > HIGH_ENERGY_MJ),
            func.avg(s.c.total_energy_mj),
            func.count(s.c.spike_grade),
            _flag(s.c.spike_grade == "moderate"),
            _flag(s.c.spike_grade == "severe"),
            _flag(in_glaucoma),
            _flag(and_(in_glaucoma, s.c.prophylaxis.is_(True))),
            _flag(s.c.glaucoma.is_(None)),
            func.count(s.c.cataract_days),
        )
        .group_by(*keys)
        .order_by(*keys)
    )


def quartile_rows(level: str, column: str, site: bool) -> ClauseElement:
    """Rows (keys..., row number, group count, value) around each group's quartiles."""
    s = _counted(site)
    keys = [s.c[name] for name in LEVELS[level]]
    value = s.c[column]
    ranked = (
        select(
            *keys,
            func.row_number().over(partition_by=keys or None, order_by=value).label("rn"),
            func.count().over(partition_by=keys or None).label("n"),
            value.label("x"),
        )
        .where(value.is_not(None))
        .subquery("r")
    )
    # 4 (rn - 1) within 4 of (n - 1) k for k = 1, 2, 3: the rows either side of position
    # (n - 1) k / 4 (0-based), in whole numbers so both engines agree exactly.
    at = 4 * (ranked.c.rn - 1)
    near = [and_(at > (ranked.c.n - 1) * k - 4, at < (ranked.c.n - 1) * k + 4) for k in (1, 2, 3)]
    out = [ranked.c[name] for name in LEVELS[level]]
    return (
        select(*out, ranked.c.rn.cast(Integer), ranked.c.n.cast(Integer), ranked.c.x)
        .where(near[0] | near[1] | near[2])
        .order_by(*out, ranked.c.rn)
    )


# What the review visits of the counted sessions say (capnote.review), per session: each
# complication counted where a signed review recorded it (seen or not seen); not recorded is
# left out of its denominator, never counted as "no".
REVIEW_FINDINGS = (
    "retinal_detachment",
    "cystoid_macular_oedema",
    "anterior_uveitis",
    "raised_iop",
    "iol_pits",
    "retreatment",
)
REVIEW_NAMES = (
    "booked",
    "booked_attended",
    "booked_missed",
    "reviewed",
    *(f"{name}{part}" for name in (*REVIEW_FINDINGS, "opening_poor") for part in ("_n", "")),
)


def _reviews_per_session(site: bool) -> Any:
    """One row per counted session: its unit, clinician and whether a review was booked;
    whether any signed review was attended (1), only missed ones (0) or none is on record
    (None); and per finding 1 (seen at any review), 0 (looked for and not seen), or None
    (no review recorded it). The newest version of each review counts, if it is signed; a
    voided or draft review does not.

    Written as a left join on the session index with a NOT EXISTS for "newest", not as a
    join of grouped subqueries: grouped subqueries are estimated at one row by PostgreSQL
    until the table is analysed, and a nested loop over two of them never ends."""
    s = _counted(site)
    r = _REVIEW.alias("r")
    later = _REVIEW.alias("later")
    newer = (
        select(literal(1))
        .where(later.c.review_key == r.c.review_key, later.c.version > r.c.version)
        .exists()
    )
    attended = r.c.attended.is_(True)

    def said(column: Any, seen: Any) -> Any:
        # Only what an attended review recorded: seen 1, not seen 0, not recorded None.
        return func.max(case((and_(attended, seen), 1), (and_(attended, column.is_not(None)), 0)))

    findings = [said(r.c[name], r.c[name].is_(True)).label(name) for name in REVIEW_FINDINGS]
    poor = r.c.opening_adequate
    return (
        select(
            s.c.site,
            s.c.performer,
            s.c.review_booked,
            func.max(case((attended, 1), (r.c.attended.is_(False), 0))).label("attended"),
            *findings,
            # A poor opening: patent or adequate recorded no (capnote.reviews._opening_adequate).
            said(poor, poor.is_(False)).label("opening_poor"),
        )
        .select_from(
            s.outerjoin(
                r,
                and_(r.c.session_key == s.c.note_key, r.c.status == literal("final"), ~newer),
            )
        )
        .group_by(s.c.note_key, s.c.site, s.c.performer, s.c.review_booked)
        .subquery("rs")
    )


def review_counts(site: bool) -> ClauseElement:
    """One row per clinician within a unit: unit, clinician, then REVIEW_NAMES. Every
    figure is a sum over sessions, so the units' and everyone's are these rows added up
    (review_rollup): one pass over the reviews instead of one per level."""
    rs = _reviews_per_session(site)
    keys = [rs.c[name] for name in LEVELS["clinician"]]
    booked = rs.c.review_booked.is_(True)
    columns: list[Any] = [
        _flag(booked),
        _flag(and_(booked, rs.c.attended == 1)),
        _flag(and_(booked, rs.c.attended == 0)),
        _flag(rs.c.attended == 1),
    ]
    for name in (*REVIEW_FINDINGS, "opening_poor"):
        columns += [func.count(rs.c[name]), func.coalesce(func.sum(rs.c[name]), 0)]
    return select(*keys, *columns).group_by(*keys).order_by(*keys)


def review_rollup(rows: Sequence[Sequence[Any]], level: str) -> dict[tuple[str, ...], list[int]]:
    """review_counts' rows added up to the groups of a level (keys: its first keys)."""
    width, full = len(LEVELS[level]), len(LEVELS["clinician"])
    out: dict[tuple[str, ...], list[int]] = {}
    for row in rows:
        summed = out.setdefault(tuple(row[:width]), [0] * len(REVIEW_NAMES))
        for i, value in enumerate(row[full:]):
            summed[i] += int(value or 0)
    return out


@dataclass(frozen=True, slots=True)
class GroupFigures:
    """One group's aggregates: its level, keys and names, the counts (COUNT_NAMES), and the
    quartiles (q1, median, q3) of total energy and of days from cataract surgery."""

    level: str
    keys: tuple[str, ...]
    names: tuple[str | None, ...]
    counts: dict[str, float | int | None]
    energy: tuple[float, float, float] | None
    cataract_days: tuple[float, float, float] | None
    # REVIEW_NAMES: what the sessions' review visits say.
    reviews: dict[str, int]


def quartiles(rows: Sequence[Sequence[Any]], width: int) -> dict[tuple[str, ...], Any]:
    """Each group's (q1, median, q3) from quartile_rows' rows (keys are the first width)."""
    grouped: dict[tuple[str, ...], tuple[int, dict[int, float]]] = {}
    for row in rows:
        keys = tuple(row[:width])
        rn, n, x = row[width:]
        grouped.setdefault(keys, (int(n), {}))[1][int(rn)] = float(x)
    return {
        keys: tuple(quantile_from(n, ranked, q) for q in (0.25, 0.5, 0.75))
        for keys, (n, ranked) in grouped.items()
    }


def figures(
    level: str,
    count_rows: Sequence[Sequence[Any]],
    energy_rows: Sequence[Sequence[Any]],
    cataract_rows: Sequence[Sequence[Any]],
    review_rows: Sequence[Sequence[Any]],
) -> list[GroupFigures]:
    """GroupFigures of one level from its three statements' rows and review_counts'."""
    width = len(LEVELS[level])
    energy = quartiles(energy_rows, width)
    cataract = quartiles(cataract_rows, width)
    reviews = {
        keys: dict(zip(REVIEW_NAMES, summed, strict=True))
        for keys, summed in review_rollup(review_rows, level).items()
    }
    out = []
    for row in count_rows:
        keys = tuple(row[:width])
        values = row[2 * width :]
        counted: dict[str, float | int | None] = {
            name: (None if v is None else float(v) if name == "energy_mean" else int(v))
            for name, v in zip(COUNT_NAMES, values, strict=True)
        }
        out.append(
            GroupFigures(
                level,
                keys,
                tuple(row[width : 2 * width]),
                counted,
                energy.get(keys),
                cataract.get(keys),
                reviews.get(keys, dict.fromkeys(REVIEW_NAMES, 0)),
            )
        )
    return out
