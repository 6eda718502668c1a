"""Blocking checks: values that cannot be right, and fields that contradict each other."""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from datetime import UTC, date, datetime, timedelta

from schemas.note import Note, VisualAcuity
from service.acuity import AcuityError, to_logmar
from service.derive import total_energy_mj
from service.findings import Finding
from service.policy.model import Range
from service.rules.base import Check, Context, error, outside_limit


def ranges(note: Note, ctx: Context) -> Iterator[Finding]:
    """Every number against its hard limit."""
    lim = ctx.policy.limits
    before, laser, result, plan = note.before, note.laser, note.result, note.plan
    # (location, value, limit, what): locations of list items are made only for a value
    # that breaks its limit, since nearly every note breaks none.
    checks: list[tuple[str, float | None, Range, str]] = [
        ("before.iop.value_mmhg", before.iop.value_mmhg, lim.iop_mmhg, "IOP"),
        ("laser.wavelength_nm", laser.wavelength_nm, lim.wavelength_nm, "wavelength"),
        (
            "before.iol.optic_diameter_mm",
            before.iol.optic_diameter_mm,
            lim.iol_optic_mm,
            "IOL optic diameter",
        ),
        (
            "before.risk_factors.axial_length_mm",
            before.risk_factors.axial_length_mm,
            lim.axial_length_mm,
            "axial length",
        ),
        (
            "laser.contact_lens.cone_angle_deg",
            laser.contact_lens.cone_angle_deg,
            lim.cone_angle_deg,
            "cone angle",
        ),
        (
            "plan.iop_recheck_minutes",
            plan.iop_recheck_minutes,
            lim.iop_recheck_minutes,
            "IOP recheck interval",
        ),
        ("plan.review_days", plan.review_days, lim.review_days, "review interval"),
    ]
    if laser.focus is not None:
        checks.append(
            (
                "laser.focus.distance_mm",
                laser.focus.distance_mm,
                lim.focus_distance_mm,
                "focus distance",
            )
        )
    for location, value, limit, what in checks:
        if value is not None and not limit.contains(value):
            yield _outside(location, value, limit, what)
    for i, s in enumerate(laser.series):
        if not lim.pulse_energy_mj.contains(s.energy_mj):
            yield _outside(
                f"laser.series[{i}].energy_mj", s.energy_mj, lim.pulse_energy_mj, "pulse energy"
            )
        if not lim.pulses_per_series.contains(s.pulses):
            yield _outside(
                f"laser.series[{i}].pulses", s.pulses, lim.pulses_per_series, "pulse count"
            )
    if result.opening is not None:
        for side, value in (
            ("horizontal_mm", result.opening.horizontal_mm),
            ("vertical_mm", result.opening.vertical_mm),
        ):
            found = outside_limit(
                f"result.opening.{side}", value, lim.opening_mm, "opening diameter"
            )
            if found is not None:
                yield found
    for i, r in enumerate(result.iop_after):
        if not lim.iop_mmhg.contains(r.value_mmhg):
            yield _outside(f"result.iop_after[{i}].value_mmhg", r.value_mmhg, lim.iop_mmhg, "IOP")
    strengths = lim.drop_strength_percent
    drops = [("prophylaxis", i, d.strength_percent) for i, d in enumerate(plan.prophylaxis)]
    drops += [("take_home", i, d.strength_percent) for i, d in enumerate(plan.take_home)]
    for group, i, strength in drops:
        if strength is not None and not strengths.contains(strength):
            where = f"plan.{group}[{i}].strength_percent"
            yield _outside(where, strength, strengths, "drop strength")
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


def _acuity(location: str, acuity: VisualAcuity | None, ctx: Context) -> Iterator[Finding]:
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
    yield from _acuity("before.visual_acuity", note.before.visual_acuity, ctx)
    yield from _acuity("result.visual_acuity_after", note.result.visual_acuity_after, ctx)


# Nd:YAG capsulotomy entered practice around 1980 (from memory); an earlier time is an entry
# error, and times near year 1 would overflow time-zone arithmetic further on.
EARLIEST = datetime(1980, 1, 1, tzinfo=UTC)
EARLIEST_SURGERY = date(1940, 1, 1)  # before the first intraocular lenses (from memory)


def too_early(note: Note) -> Iterator[Finding]:
    """Every time and date no earlier than the procedure could have been."""
    stamped: list[tuple[str, datetime | None]] = [
        ("started_at", note.started_at),
        ("ended_at", note.ended_at),
        ("consent.recorded_at", note.consent.recorded_at),
        ("before.iop.measured_at", note.before.iop.measured_at),
    ]
    # List items' locations are made only for a time that is too early (as in ranges).
    stamped += [
        (f"result.iop_after[{i}].measured_at", r.measured_at)
        for i, r in enumerate(note.result.iop_after)
        if r.measured_at < EARLIEST
    ]
    for where, moment in stamped:
        if moment is not None and moment < EARLIEST:
            yield error(
                "time-too-early",
                where,
                f"{where} lies before 1980",
                "Nd:YAG capsulotomy records start in 1980 (from memory)",
                value=moment.isoformat(),
                allowed=">= 1980-01-01",
            )
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


def times(note: Note, ctx: Context) -> Iterator[Finding]:
    """Times must be in order, not too early and not in the future."""
    yield from too_early(note)
    tolerance = timedelta(minutes=ctx.policy.limits.future_tolerance_minutes.value)
    latest_allowed = ctx.now + tolerance
    stamped = [("started_at", note.started_at), ("ended_at", note.ended_at)]
    for where, moment in stamped:
        if moment is not None and moment > latest_allowed:
            yield error(
                "time-in-future",
                where,
                f"{where} lies in the future",
                "a session is recorded after it happened",
                value=moment.isoformat(),
                allowed=f"no later than the present time plus {tolerance.seconds // 60} min",
                source=ctx.policy.limits.future_tolerance_minutes.source,
            )
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
    if note.result.outcome != "failed" and note.result.opening is None:
        yield error(
            "missing-field",
            "result.opening",
            "a complete or partial opening needs its size",
            "outcome 'complete' or 'partial' requires opening",
            issue_type="required",
        )


CHECKS: Iterable[Check] = (ranges, acuities, times, totals, completeness)
