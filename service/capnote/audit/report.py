"""The audit's figures, from the store's aggregates (capnote.store.audit_sql): every rate
with its count, denominator and 95% Wilson interval, each clinician placed on the funnel of
the unit's rate, and the published series the local figures are set against.

What the review visits say (capnote.review) is counted per session: booked reviews
attended or missed, and each complication over the sessions whose signed review recorded it
(seen or not seen); a finding nobody recorded is in no denominator, never a "no".
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, date, datetime, time, timedelta

from capnote.audit.stats import Rate, outside, rate
from capnote.store.audit_sql import GroupFigures

CAUTION = (
    "These are local figures set against published series; differences in case mix "
    "explain much; local governance decides. capnote documents and counts: it does not "
    "judge a clinician or a unit."
)

# The published series, as the reference table gives them (shared clinical-practice table).
PUBLISHED_ENERGY = (
    ("Verma and Ahuja, Delhi J Ophthalmol 2020: mean total energy", "58.6 ± 34.6 mJ"),
    (
        "Parajuli et al., Clin Ophthalmol 2019;13:945 (doi 10.2147/OPTH.S203677): group ≤ 50 mJ",
        "26.6 ± 12.9 mJ",
    ),
    ("Parajuli et al. 2019: group > 50 mJ", "82.0 ± 32.1 mJ"),
)
ENERGY_BANDS_SOURCE = "energy bands 0-40, 40-80, > 80 mJ: Chawla et al., ESCRS 2014 abstract"
SPIKE_SOURCE = (
    "rise above the pre-laser IOP: moderate 5-9, severe ≥ 10 mmHg (Chawla et al., ESCRS "
    "2014; the site's policy may set other thresholds). capnote's reference table holds "
    "no published incidence to set these rates against."
)
PROPHYLAXIS_SOURCE = (
    "prophylaxis advised at least in glaucoma and glaucoma suspects (Ophthalmology "
    "Journal, Via Medica); glaucoma not recorded is counted apart, never as no glaucoma"
)
STEINBERG = "Steinberg et al., Am J Ophthalmol 1991;112:373"
# What the review visits say: label and the published figure set beside it (None: the
# reference table holds none).
REVIEW_LABELS: dict[str, tuple[str, str | None]] = {
    "review_attended": ("booked reviews attended", None),
    "review_missed": ("booked reviews not attended", None),
    "retinal_detachment": ("retinal detachment found at review", f"0.89% ({STEINBERG})"),
    "cystoid_macular_oedema": ("cystoid macular oedema found at review", f"1.23% ({STEINBERG})"),
    "anterior_uveitis": ("anterior uveitis found at review", None),
    "raised_iop": ("raised IOP needing treatment at review", None),
    "iol_pits": ("IOL pits seen at review", None),
    "opening_poor": ("opening not patent or not adequate at review", None),
    "retreatment": ("further laser needed", None),
}
REVIEW_SOURCE = (
    "Each complication is counted over the sessions whose signed review recorded it (seen "
    "or looked for and not seen); not recorded is in no denominator. Retinal detachment and "
    "cystoid macular oedema can appear months after the laser (Steinberg 1991 followed "
    "patients longer): a review weeks after the laser sees only what has appeared by then."
)

# Which rates a clinician is placed on the unit's funnel for.
FUNNELS = (
    ("iop_rise", "moderate or severe IOP rise"),
    ("energy_over_80", "total energy above 80 mJ"),
)


@dataclass(frozen=True, slots=True)
class Figures:
    """One unit's, one clinician's or everyone's figures."""

    key: str  # unit code, or system|value of the clinician; "" for all units
    name: str
    sessions: int
    eyes: int
    energy_mean: float | None
    energy_quartiles: tuple[float, float, float] | None
    cataract_days: tuple[float, float, float] | None
    cataract_n: int
    glaucoma_unrecorded: int
    rates: dict[str, Rate]
    # REVIEW_LABELS' rates, and the booked reviews with no signed review record yet.
    review_rates: dict[str, Rate]
    reviews_awaited: int


@dataclass(frozen=True, slots=True)
class Placed:
    """A clinician on the unit's funnel for one rate."""

    clinician: Figures
    measure: str
    where: str  # capnote.audit.stats.outside, or "no denominator"


@dataclass(frozen=True, slots=True)
class Unit:
    """One unit: its figures, its clinicians' and where each falls on its funnels."""

    figures: Figures
    clinicians: tuple[Figures, ...]
    funnels: dict[str, tuple[Placed, ...]]


@dataclass(frozen=True, slots=True)
class Report:
    """The whole audit of a period."""

    start: date
    end: date  # inclusive
    site: str | None
    clinician: str | None
    everyone: Figures | None
    units: tuple[Unit, ...]


RATE_LABELS = {
    "energy_over_80": "total energy above 80 mJ",
    "spike_moderate": "moderate IOP rise (5-9 mmHg)",
    "spike_severe": "severe IOP rise (≥ 10 mmHg)",
    "iop_rise": "moderate or severe IOP rise",
    "glaucoma_prophylaxis": "prophylaxis given in glaucoma or suspect",
}


def _figures(group: GroupFigures) -> Figures:
    c = group.counts

    def n(name: str) -> int:
        value = c[name]
        return 0 if value is None else int(value)

    rises = n("spike_moderate") + n("spike_severe")
    return Figures(
        key=group.keys[-1] if group.keys else "",
        name=(group.names[-1] if group.names else None) or "all units",
        sessions=n("sessions"),
        eyes=n("eyes"),
        # To 1e-9 mJ: the database's average depends in its last bits on the order it sums
        # in (PostgreSQL's varies by plan), and a report must not change with the plan.
        energy_mean=None if c["energy_mean"] is None else round(float(c["energy_mean"]), 9),
        energy_quartiles=group.energy,
        cataract_days=group.cataract_days,
        cataract_n=n("cataract_n"),
        glaucoma_unrecorded=n("glaucoma_unrecorded"),
        rates={
            "energy_over_80": rate(n("energy_over_80"), n("energy_n")),
            "spike_moderate": rate(n("spike_moderate"), n("spike_n")),
            "spike_severe": rate(n("spike_severe"), n("spike_n")),
            "iop_rise": rate(rises, n("spike_n")),
            "glaucoma_prophylaxis": rate(n("glaucoma_prophylaxis"), n("glaucoma_n")),
        },
        review_rates=_review_rates(group.reviews),
        reviews_awaited=group.reviews["booked"]
        - group.reviews["booked_attended"]
        - group.reviews["booked_missed"],
    )


def _review_rates(r: dict[str, int]) -> dict[str, Rate]:
    out = {
        "review_attended": rate(r["booked_attended"], r["booked"]),
        "review_missed": rate(r["booked_missed"], r["booked"]),
    }
    for name in REVIEW_LABELS:
        if name not in out:
            out[name] = rate(r[name], r[f"{name}_n"])
    return out


def _place(clinician: Figures, unit: Figures, measure: str) -> Placed:
    mine, target = clinician.rates[measure], unit.rates[measure].value
    if not mine.total or target is None:
        return Placed(clinician, measure, "no denominator")
    return Placed(clinician, measure, outside(mine.count, mine.total, target))


def build(
    groups: list[GroupFigures],
    start: date,
    end: date,
    site: str | None,
    clinician: str | None,
) -> Report:
    """The report from the store's aggregates. A clinician filter (system|value, or the
    value alone) keeps only that clinician's rows; the units' figures stay whole, since the
    funnel sets a clinician against the whole unit."""
    everyone = next((_figures(g) for g in groups if g.level == "all"), None)
    units = []
    for group in (g for g in groups if g.level == "unit"):
        unit = _figures(group)
        mine = [
            _figures(g) for g in groups if g.level == "clinician" and g.keys[0] == group.keys[0]
        ]
        if clinician is not None:
            mine = [f for f in mine if f.key == clinician or f.key.endswith("|" + clinician)]
            if not mine:
                continue
        funnels = {m: tuple(_place(f, unit, m) for f in mine) for m, _ in FUNNELS}
        units.append(Unit(unit, tuple(mine), funnels))
    if everyone is not None and everyone.sessions == 0:
        everyone = None
    return Report(start, end, site, clinician, everyone, tuple(units))


def period(first: date, last: date) -> tuple[datetime, datetime]:
    """The moments [start, end) of the days first to last, both included, in UTC."""
    return datetime.combine(first, time(), UTC), datetime.combine(
        last + timedelta(days=1), time(), UTC
    )
