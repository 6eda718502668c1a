"""Blocking checks: values that cannot be right, and fields that contradict each other."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from datetime import UTC, date, datetime, timedelta
from operator import attrgetter

from capnote.acuity import AcuityError, to_logmar
from capnote.derive import total_energy_mj
from capnote.findings import Finding
from capnote.note import ClinicDrop, HomeDrop, Note, VisualAcuity
from capnote.policy.model import Limits, Range
from capnote.rules.base import Check, Context, error, outside_limit


def _reader(path: str) -> Callable[[Note], float | None]:
    """The number at a dotted path of a note, None where it or an optional part is absent."""
    get = attrgetter(path)

    def read(note: Note) -> float | None:
        try:
            return get(note)  # type: ignore[no-any-return]
        except AttributeError:  # an optional part (focus, opening) is not there
            return None

    return read


# Every single number of a note: (location, its limit in the policy, what it is). A table,
# so that a new limit is one line and every note is checked with a few comparisons.
_SINGLE_LIMITS = (
    ("before.iop.value_mmhg", "iop_mmhg", "IOP"),
    ("laser.wavelength_nm", "wavelength_nm", "wavelength"),
    ("before.iol.optic_diameter_mm", "iol_optic_mm", "IOL optic diameter"),
    ("before.risk_factors.axial_length_mm", "axial_length_mm", "axial length"),
    ("laser.contact_lens.cone_angle_deg", "cone_angle_deg", "cone angle"),
    ("laser.contact_lens.magnification", "lens_magnification", "lens magnification"),
    ("laser.pulses_per_burst", "pulses_per_burst", "pulses per burst"),
    ("plan.iop_recheck_minutes", "iop_recheck_minutes", "IOP recheck interval"),
    ("plan.review_days", "review_days", "review interval"),
    ("laser.focus.distance_mm", "focus_distance_mm", "focus distance"),
    ("result.opening.horizontal_mm", "opening_mm", "opening diameter"),
    ("result.opening.vertical_mm", "opening_mm", "opening diameter"),
)
_SINGLE = tuple(
    (location, _reader(location), attrgetter(limit), what)
    for location, limit, what in _SINGLE_LIMITS
)


def ranges(note: Note, ctx: Context) -> Iterator[Finding]:
    """Every number against its hard limit."""
    lim = ctx.policy.limits
    for location, read, limit_of, what in _SINGLE:
        value = read(note)
        if value is not None:
            limit = limit_of(lim)
            low, above, high = limit.bounds
            if not (low <= value <= high and value > above):
                yield _outside(location, value, limit, what)
    yield from _listed(note, lim)


def _listed(note: Note, lim: Limits) -> Iterator[Finding]:
    """The numbers of list items; a location is made only for a value that breaks its limit,
    since nearly every note breaks none."""
    energy, pulses = lim.pulse_energy_mj, lim.pulses_per_series
    for i, s in enumerate(note.laser.series):
        if not energy.contains(s.energy_mj):
            yield _outside(f"laser.series[{i}].energy_mj", s.energy_mj, energy, "pulse energy")
        if not pulses.contains(s.pulses):
            yield _outside(f"laser.series[{i}].pulses", s.pulses, pulses, "pulse count")
    for i, r in enumerate(note.result.iop_after):
        if not lim.iop_mmhg.contains(r.value_mmhg):
            yield _outside(f"result.iop_after[{i}].value_mmhg", r.value_mmhg, lim.iop_mmhg, "IOP")
    plan = note.plan
    strengths = lim.drop_strength_percent
    drops: tuple[tuple[str, Sequence[ClinicDrop | HomeDrop]], ...] = (
        ("prophylaxis", plan.prophylaxis),
        ("take_home", plan.take_home),
    )
    for group, given in drops:
        for i, d in enumerate(given):
            if d.strength_percent is not None and not strengths.contains(d.strength_percent):
                where = f"plan.{group}[{i}].strength_percent"
                yield _outside(where, d.strength_percent, strengths, "drop strength")
    for i, h in enumerate(plan.take_home):
        if not lim.drop_times_per_day.contains(h.times_per_day):
            yield _outside(
                f"plan.take_home[{i}].times_per_day",
                h.times_per_day,
                lim.drop_times_per_day,
                "doses per day",
            )
        if not lim.drop_days.contains(h.days):
            yield _outside(f"plan.take_home[{i}].days", h.days, lim.drop_days, "course length")


def _outside(location: str, value: float, limit: Range, what: str) -> Finding:
    """The finding for a value already known to be outside its limit."""
    found = outside_limit(location, value, limit, what)
    assert found is not None  # the caller saw the value outside the limit
    return found


def acuity_findings(location: str, acuity: VisualAcuity | None, ctx: Context) -> Iterator[Finding]:
    """An acuity entry must be readable in its notation and lie on a chart."""
    if acuity is None:
        return
    try:
        logmar = to_logmar(acuity)
    except AcuityError as exc:
        yield error(
            "acuity-unreadable",
            f"{location}.value",
            f"visual acuity '{acuity.value}' cannot be read as {acuity.notation}",
            f"a {acuity.notation} acuity must be {exc}",
            value=acuity.value,
            allowed=str(exc),
            issue_type="value",
        )
        return
    found = outside_limit(f"{location}.value", logmar, ctx.policy.limits.logmar, "logMAR acuity")
    if found is not None:
        yield found


def acuities(note: Note, ctx: Context) -> Iterator[Finding]:
    """Acuity entries must be readable in their notation and lie on a chart."""
    yield from acuity_findings("before.visual_acuity", note.before.visual_acuity, ctx)
    yield from acuity_findings("result.visual_acuity_after", note.result.visual_acuity_after, ctx)


# Nd:YAG capsulotomy entered practice around 1980 (from memory); an earlier time is an entry
# error, and times near year 1 would overflow time-zone arithmetic further on.
EARLIEST = datetime(1980, 1, 1, tzinfo=UTC)
EARLIEST_SURGERY = date(1940, 1, 1)  # before the first intraocular lenses (from memory)


_STAMPS: tuple[tuple[str, Callable[[Note], datetime | None]], ...] = tuple(
    (where, attrgetter(where))
    for where in ("started_at", "ended_at", "consent.recorded_at", "before.iop.measured_at")
)


def _too_early(where: str, moment: datetime) -> Finding:
    return error(
        "time-too-early",
        where,
        f"{where} lies before 1980",
        "Nd:YAG capsulotomy records start in 1980 (from memory)",
        value=moment.isoformat(),
        allowed=">= 1980-01-01",
    )


def too_early(note: Note) -> Iterator[Finding]:
    """Every time and date no earlier than the procedure could have been."""
    for where, read in _STAMPS:
        moment = read(note)
        # The year first: comparing datetimes of different tzinfo objects costs a microsecond
        # each, and only a year up to 1980 can lie before EARLIEST whatever the offset.
        if moment is not None and moment.year <= EARLIEST.year and moment < EARLIEST:
            yield _too_early(where, moment)
    for i, r in enumerate(note.result.iop_after):
        if (
            r.measured_at.year <= EARLIEST.year and r.measured_at < EARLIEST
        ):  # the location is made only for a time that is too early
            yield _too_early(f"result.iop_after[{i}].measured_at", r.measured_at)
    surgery = note.before.cataract_surgery_date
    if surgery is not None and surgery < EARLIEST_SURGERY:
        yield error(
            "time-too-early",
            "before.cataract_surgery_date",
            "the cataract operation is dated before 1940",
            "intraocular lenses date from 1949 (from memory)",
            value=surgery.isoformat(),
            allowed=">= 1940-01-01",
        )


def _in_future(where: str, moment: datetime, rule: str, ctx: Context) -> Finding:
    """A time later than the present (plus the policy's tolerance for clocks apart)."""
    tolerance = ctx.policy.limits.future_tolerance_minutes
    return error(
        "time-in-future",
        where,
        f"{where} lies in the future",
        rule,
        value=moment.isoformat(),
        allowed=f"no later than the present time plus {tolerance.value:g} min",
        source=tolerance.source,
    )


def times(note: Note, ctx: Context) -> Iterator[Finding]:
    """Times must be in order, not too early and not in the future."""
    yield from too_early(note)
    tolerance = timedelta(minutes=ctx.policy.limits.future_tolerance_minutes.value)
    # The same instant in the note's own zone: comparing datetimes that share a tzinfo object
    # skips two utcoffset() calls each time.
    latest_allowed = (ctx.now + tolerance).astimezone(note.started_at.tzinfo)
    stamped = [("started_at", note.started_at), ("ended_at", note.ended_at)]
    for where, moment in stamped:
        if moment is not None and moment > latest_allowed:
            yield _in_future(where, moment, "a session is recorded after it happened", ctx)
    if note.ended_at is not None and note.ended_at < note.started_at:
        yield error(
            "ended-before-start",
            "ended_at",
            "the session ends before it starts",
            "ended_at must not be before started_at",
            value=note.ended_at.isoformat(),
            allowed=f">= {note.started_at.isoformat()}",
        )
    for i, reading in enumerate(note.result.iop_after):
        if reading.measured_at < note.started_at:
            yield error(
                "reading-before-session",
                f"result.iop_after[{i}].measured_at",
                "a post-laser IOP reading is timed before the session started",
                "post-laser readings come after started_at",
                value=reading.measured_at.isoformat(),
                allowed=f">= {note.started_at.isoformat()}",
            )
        elif reading.measured_at > latest_allowed:
            yield error(
                "time-in-future",
                f"result.iop_after[{i}].measured_at",
                "an IOP reading lies in the future",
                "readings are recorded after they are taken",
                value=reading.measured_at.isoformat(),
            )
    surgery = note.before.cataract_surgery_date
    if surgery is not None and surgery > note.started_at.date():
        yield error(
            "surgery-after-session",
            "before.cataract_surgery_date",
            "the cataract operation is dated after the laser session",
            "a capsulotomy follows the cataract operation",
            value=surgery.isoformat(),
            allowed=f"<= {note.started_at.date().isoformat()}",
        )
    consent_at = note.consent.recorded_at
    if consent_at is not None and consent_at > latest_allowed:
        yield error(
            "time-in-future",
            "consent.recorded_at",
            "consent is timed in the future",
            "consent is recorded when it is given",
            value=consent_at.isoformat(),
        )


def pathway_times(note: Note, ctx: Context) -> Iterator[Finding]:
    """Pressure treatment and discharge come after the session started and not in the future;
    a discharge comes after every treatment it closes."""
    tolerance = timedelta(minutes=ctx.policy.limits.future_tolerance_minutes.value)
    latest_allowed = (ctx.now + tolerance).astimezone(note.started_at.tzinfo)
    stamps = [
        (f"result.pressure_treatment[{i}].given_at", t.given_at)
        for i, t in enumerate(note.result.pressure_treatment)
    ]
    discharge = note.result.discharge
    if discharge is not None:
        stamps.append(("result.discharge.at", discharge.at))
    for where, moment in stamps:
        if moment < note.started_at:
            yield error(
                "time-before-session",
                where,
                f"{where} is timed before the session started",
                "treatment after the laser and discharge come after started_at",
                value=moment.isoformat(),
                allowed=f">= {note.started_at.isoformat()}",
            )
        elif moment > latest_allowed:
            yield _in_future(where, moment, "what happened is recorded after it happened", ctx)
    if discharge is not None:
        for i, t in enumerate(note.result.pressure_treatment):
            if t.given_at > discharge.at:
                yield error(
                    "treatment-after-discharge",
                    f"result.pressure_treatment[{i}].given_at",
                    "a treatment is timed after the patient was discharged",
                    "treatment in clinic comes before discharge",
                    value=t.given_at.isoformat(),
                    allowed=f"<= {discharge.at.isoformat()}",
                )
    for i, t in enumerate(note.result.pressure_treatment):
        if not t.dose > 0:
            yield error(
                "out-of-range",
                f"result.pressure_treatment[{i}].dose",
                f"a dose of {t.dose:g} {t.dose_unit} is not a dose",
                "a dose given must be more than 0",
                value=t.dose,
                allowed="> 0",
                issue_type="value",
            )


def signing(note: Note, ctx: Context) -> Iterator[Finding]:
    """What a signed (final) note must have recorded; a draft may leave these open."""
    if note.status == "final" and note.before.risk_factors.glaucoma is None:
        yield error(
            "glaucoma-status-required-to-sign",
            "before.risk_factors.glaucoma",
            "glaucoma status is not recorded: a note cannot be signed without it",
            "a final note records glaucoma status (none, suspect, mild, moderate or advanced); "
            "the glaucoma energy and prophylaxis checks depend on it",
            allowed="none | suspect | mild | moderate | advanced",
            source=ctx.policy.thresholds.glaucoma_severities.source,
            issue_type="required",
        )


def totals(note: Note, ctx: Context) -> Iterator[Finding]:
    """The laser's own counter must agree with the series within the tolerance."""
    reported = note.laser.reported_total_energy_mj
    if reported is None:
        return
    tol = ctx.policy.limits.total_energy_tolerance
    computed = total_energy_mj(note.laser)
    allowed_gap = max(tol.mj, computed * tol.percent / 100.0)
    if abs(reported - computed) > allowed_gap:
        yield error(
            "total-energy-mismatch",
            "laser.reported_total_energy_mj",
            f"the laser reported {reported:g} mJ but the series add up to {computed:g} mJ",
            "the reported total energy agrees with the sum of energy x pulses",
            value=reported,
            allowed=f"{computed - allowed_gap:g} to {computed + allowed_gap:g} mJ",
            source=tol.source,
        )


def completeness(note: Note, ctx: Context) -> Iterator[Finding]:
    """Fields that become required by another field's value."""
    if note.laser.pattern == "other" and note.laser.pattern_text is None:
        yield error(
            "missing-field",
            "laser.pattern_text",
            "an 'other' opening pattern needs a description",
            "pattern 'other' requires pattern_text",
            issue_type="required",
        )
    focus = note.laser.focus
    if focus is not None and focus.distance_mm is None:
        yield error(
            "missing-field",
            "laser.focus.distance_mm",
            "the focus method needs its distance (offset, or the estimated distance by hand)",
            "focus requires distance_mm",
            issue_type="required",
        )
    for i, c in enumerate(note.result.complications):
        if c.kind == "other" and c.text is None:
            yield error(
                "missing-field",
                f"result.complications[{i}].text",
                "an 'other' complication needs a description",
                "kind 'other' requires text",
                issue_type="required",
            )
        if c.kind == "iol-pit" and c.on_visual_axis is None:
            yield error(
                "missing-field",
                f"result.complications[{i}].on_visual_axis",
                "say whether the IOL pit lies on the visual axis",
                "kind 'iol-pit' requires on_visual_axis",
                issue_type="required",
            )
        if c.kind != "iol-pit" and c.positions:
            yield error(
                "field-not-allowed",
                f"result.complications[{i}].positions",
                "positions are recorded for IOL pits only",
                "positions go with kind 'iol-pit'",
                issue_type="invalid",
            )
    laser = note.laser
    focus = laser.focus
    if focus is not None and focus.distance_um is not None:
        # Only left when distance_mm was given too (capnote.note.Focus moves a lone one).
        yield error(
            "field-not-allowed",
            "laser.focus.distance_um",
            "the focus distance is given twice, in mm and in um",
            "give distance_mm or distance_um, not both",
            value=focus.distance_um,
            issue_type="invalid",
        )
    lens = laser.contact_lens
    if not lens.used:
        for name in ("lens", "magnification"):
            if getattr(lens, name) is not None:
                yield error(
                    "field-not-allowed",
                    f"laser.contact_lens.{name}",
                    f"a contact lens {name} is given, but no contact lens was used",
                    f"contact_lens.{name} requires contact_lens.used true",
                    issue_type="invalid",
                )
    if laser.mode == "burst" and laser.pulses_per_burst is None:
        burst = ctx.policy.limits.pulses_per_burst
        yield error(
            "missing-field",
            "laser.pulses_per_burst",
            "burst mode needs the number of pulses per burst",
            "mode 'burst' requires pulses_per_burst",
            allowed=burst.describe(),
            issue_type="required",
        )
    if laser.mode != "burst" and laser.pulses_per_burst is not None:
        yield error(
            "field-not-allowed",
            "laser.pulses_per_burst",
            "pulses per burst go with burst mode only",
            "pulses_per_burst requires mode 'burst'",
            issue_type="invalid",
        )
    if note.result.outcome != "failed" and note.result.opening is None:
        yield error(
            "missing-field",
            "result.opening",
            "a complete or partial opening needs its size",
            "outcome 'complete' or 'partial' requires opening",
            issue_type="required",
        )


CHECKS: Iterable[Check] = (
    ranges,
    acuities,
    times,
    pathway_times,
    totals,
    completeness,
    signing,
)
