"""Derived values: what follows from one note (and the eye's earlier sessions). Pure, no I/O.

derive() expects a note that passed the blocking rules; the functions it calls are public
and unit-tested one by one.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, datetime
from typing import Literal

from capnote.acuity import AcuityError, to_logmar
from capnote.note import IopReading, LaserSettings, Note, Opening, RiskFactors, VisualAcuity
from capnote.optics import FocalSpot, focal_spot
from capnote.policy.model import Bands, Policy, Thresholds

SpikeGrade = Literal["none", "mild", "moderate", "severe"]
RiskLevel = Literal["routine", "raised"]


@dataclass(frozen=True, slots=True)
class EnergyBand:
    """Which total-energy band a session falls in (1 is the lowest)."""

    index: int
    label: str


@dataclass(frozen=True, slots=True)
class IopChange:
    """One post-laser reading against the pre-laser IOP."""

    reading_index: int
    measured_at: datetime | None
    minutes_after: float | None
    value_mmhg: float
    change_mmhg: float


@dataclass(frozen=True, slots=True)
class IopCourse:
    """All post-laser changes, the highest rise and its grade."""

    changes: tuple[IopChange, ...]
    highest: IopChange | None
    spike_grade: SpikeGrade


@dataclass(frozen=True, slots=True)
class OpeningSize:
    """The opening's area and how it compares with the IOL optic.

    ratio_to_optic is a diameter ratio (the widest axis over the optic diameter), never an
    area ratio; None when the optic diameter is not recorded. round_assumed: one diameter
    was measured, so the area assumes a round opening.
    """

    area_mm2: float
    largest_mm: float
    ratio_to_optic: float | None
    round_assumed: bool = False


@dataclass(frozen=True, slots=True)
class Acuity:
    """logMAR before and after, and the change (negative is better)."""

    before_logmar: float | None
    after_logmar: float | None
    change_logmar: float | None


@dataclass(frozen=True, slots=True)
class RiskReason:
    """Why a session counts as raised risk."""

    code: str
    text: str
    # What the reason changes in the follow-up, and why: from the policy's [risk_reasons],
    # shown beside the due dates so nobody has to guess why a review came early.
    changes: str = ""
    source: str = ""


@dataclass(frozen=True, slots=True)
class Risk:
    """The risk level the scheduler uses, with every reason for it."""

    level: RiskLevel
    reasons: tuple[RiskReason, ...]


@dataclass(frozen=True, slots=True)
class PriorSession:
    """Another session on the same patient's same eye, as the store knows it (key: its note
    key, when it has one)."""

    started_at: datetime
    total_energy_mj: float
    key: str = ""


@dataclass(frozen=True, slots=True)
class Cumulative:
    """This eye's sessions so far, this one included."""

    session_number: int
    cumulative_energy_mj: float
    days_since_last_session: int | None


@dataclass(frozen=True, slots=True)
class Derived:
    """Everything derived from one note."""

    total_pulses: int
    total_energy_mj: float
    mean_pulse_energy_mj: float
    highest_pulse_energy_mj: float
    energy_band: EnergyBand
    opening: OpeningSize | None
    days_since_cataract_surgery: int | None
    acuity: Acuity
    iop: IopCourse
    focal_spot: FocalSpot
    risk: Risk
    cumulative: Cumulative
    pathway: PressurePathway


def total_pulses(laser: LaserSettings) -> int:
    """All pulses of all series."""
    return sum(s.pulses for s in laser.series)


def total_energy_mj(laser: LaserSettings) -> float:
    """Energy delivered by all series, from their settings."""
    return round(math.fsum(s.energy_mj * s.pulses for s in laser.series), 3)


def highest_pulse_energy_mj(laser: LaserSettings) -> float:
    """The highest setting used."""
    return max(s.energy_mj for s in laser.series)


def band_index(total_mj: float, bands: Bands) -> int:
    """The band a total energy falls in, from 1; a value on a cut point belongs to the lower."""
    index = 1
    for cut in bands.values:
        if total_mj > cut:
            index += 1
    return index


def energy_band(total_mj: float, bands: Bands) -> EnergyBand:
    """The band for a total energy; a value on a cut point belongs to the lower band."""
    cuts = bands.values
    index = band_index(total_mj, bands)
    if index == 1:
        label = f"<= {cuts[0]:g} {bands.unit}"
    elif index > len(cuts):
        label = f"> {cuts[-1]:g} {bands.unit}"
    else:
        label = f"> {cuts[index - 2]:g} to {cuts[index - 1]:g} {bands.unit}"
    return EnergyBand(index=index, label=label)


def opening_size(opening: Opening, optic_diameter_mm: float | None) -> OpeningSize:
    """Area of a round or elliptical opening, and its widest diameter over the optic's."""
    round_ = opening.vertical_mm is None
    vertical = opening.horizontal_mm if opening.vertical_mm is None else opening.vertical_mm
    largest = max(opening.horizontal_mm, vertical)
    return OpeningSize(
        area_mm2=round(math.pi / 4.0 * opening.horizontal_mm * vertical, 2),
        largest_mm=largest,
        ratio_to_optic=(
            round(largest / optic_diameter_mm, 2) if optic_diameter_mm is not None else None
        ),
        round_assumed=round_,
    )


def days_between(earlier: date, later: date) -> int:
    """Whole days from one date to another."""
    return (later - earlier).days


def acuity_logmar(acuity: VisualAcuity | None) -> float | None:
    """logMAR of an entry, or None where there is none or it cannot be read."""
    if acuity is None:
        return None
    try:
        return to_logmar(acuity)
    except AcuityError:
        return None


def acuity_change(before: VisualAcuity | None, after: VisualAcuity | None) -> Acuity:
    """logMAR before and after the laser and the change."""
    b, a = acuity_logmar(before), acuity_logmar(after)
    change = round(a - b, 2) + 0.0 if a is not None and b is not None else None
    return Acuity(before_logmar=b, after_logmar=a, change_logmar=change)


def spike_grade(rise_mmhg: float, thresholds: Thresholds) -> SpikeGrade:
    """Grade an IOP rise above the pre-laser value."""
    if rise_mmhg >= thresholds.iop_rise_severe_mmhg.value:
        return "severe"
    if rise_mmhg >= thresholds.iop_rise_moderate_mmhg.value:
        return "moderate"
    return "mild" if rise_mmhg > 0 else "none"


def iop_rise(before: IopReading, reading: IopReading) -> float:
    """How far a post-laser reading lies above the pre-laser one (negative below), in mmHg."""
    return round(reading.value_mmhg - before.value_mmhg, 1)


def reading_needs_action(before: IopReading, reading: IopReading, thresholds: Thresholds) -> bool:
    """A post-laser reading that must be treated and re-measured before the patient leaves:
    a severe rise, or an IOP at or over the site's action level (iop_high_mmhg)."""
    return (
        spike_grade(iop_rise(before, reading), thresholds) == "severe"
        or reading.value_mmhg >= thresholds.iop_high_mmhg.value
    )


@dataclass(frozen=True, slots=True)
class PressurePathway:
    """Where the post-laser pressure pathway stands.

    open_reading: the index of the last reading that needs action when no later reading is
    below the action level and no discharge reason is recorded (None: nothing left open).
    discharge_reading: the index of the last reading at or before discharge (None: no
    discharge recorded, or no reading before it).
    """

    needs_action: tuple[int, ...]
    open_reading: int | None
    discharge_reading: int | None
    # Per pressure treatment: the reading it answered (the latest needing action at or
    # before it was given), None when no such reading comes before it.
    treated_reading: tuple[int | None, ...] = ()


def pressure_pathway(note: Note, thresholds: Thresholds) -> PressurePathway:
    """Which readings needed action, whether a later safe reading (or a reason) closed it."""
    before, after = note.before.iop, note.result.iop_after
    order = sorted(range(len(after)), key=lambda i: after[i].measured_at)
    flagged = tuple(i for i in order if reading_needs_action(before, after[i], thresholds))
    open_reading: int | None = None
    if flagged:
        last = flagged[-1]
        needing = set(flagged)
        later_safe = any(
            after[i].measured_at > after[last].measured_at and i not in needing for i in order
        )
        discharge = note.result.discharge
        reasoned = discharge is not None and discharge.reason is not None
        if not later_safe and not reasoned:
            open_reading = last
    discharge_reading: int | None = None
    if note.result.discharge is not None:
        at = note.result.discharge.at
        upto = [i for i in order if after[i].measured_at <= at]
        discharge_reading = upto[-1] if upto else None
    treated: list[int | None] = []
    for given in note.result.pressure_treatment:
        earlier = [i for i in flagged if after[i].measured_at <= given.given_at]
        treated.append(earlier[-1] if earlier else None)
    return PressurePathway(flagged, open_reading, discharge_reading, tuple(treated))


def iop_course(
    before: IopReading, after: Sequence[IopReading], reference: datetime, thresholds: Thresholds
) -> IopCourse:
    """Change of every post-laser reading; the highest rise and its spike grade."""
    changes = tuple(
        IopChange(
            reading_index=i,
            measured_at=r.measured_at,
            minutes_after=(
                round((r.measured_at - reference).total_seconds() / 60.0, 1)
                if r.measured_at is not None
                else None
            ),
            value_mmhg=r.value_mmhg,
            change_mmhg=iop_rise(before, r),
        )
        for i, r in enumerate(after)
    )
    highest = max(changes, key=lambda c: c.change_mmhg, default=None)
    grade = spike_grade(highest.change_mmhg, thresholds) if highest is not None else "none"
    return IopCourse(changes=changes, highest=highest, spike_grade=grade)


def cone_angle(note: Note, thresholds: Thresholds) -> tuple[float, bool]:
    """The cone angle used, and whether it was assumed from the policy."""
    lens = note.laser.contact_lens
    if lens.cone_angle_deg is not None:
        return lens.cone_angle_deg, False
    if lens.used and lens.magnification is not None:
        # A lens with spot magnification M multiplies the numerical aperture of the bare
        # beam by M (from memory: spot diameter falls by 1/M, fluence rises by M^2).
        bare = math.radians(thresholds.cone_angle_without_lens_deg.value / 2.0)
        na = min(lens.magnification * math.sin(bare), 0.99)
        return round(math.degrees(2.0 * math.asin(na)), 1), True
    default = (
        thresholds.cone_angle_with_lens_deg if lens.used else thresholds.cone_angle_without_lens_deg
    )
    return default.value, True


def risk(factors: RiskFactors, course: IopCourse, band: EnergyBand, policy: Policy) -> Risk:
    """Routine or raised, with every reason (retinal detachment, CME and IOP risk)."""
    t = policy.thresholds
    reasons: list[RiskReason] = []

    def add(code: str, text: str) -> None:
        entry = policy.risk_reasons[code]  # the policy has an entry for every code
        reasons.append(RiskReason(code, text, policy.risk_changes(code), entry.source))

    if factors.glaucoma in t.glaucoma_severities.values:
        add("glaucoma", f"glaucoma ({factors.glaucoma})")
    if factors.high_myopia:
        add("high-myopia", "high myopia")
    if (
        factors.axial_length_mm is not None
        and factors.axial_length_mm >= t.rd_axial_length_mm.value
    ):
        add("axial-length", f"axial length {t.rd_axial_length_mm.value:g} mm or more")
    if factors.uveitis:
        add("uveitis", "uveitis")
    if factors.diabetic_macular_oedema:
        add("diabetic-macular-oedema", "diabetic macular oedema")
    if factors.retinal_detachment_this_eye or factors.retinal_detachment_fellow_eye:
        add("retinal-detachment-history", "earlier retinal detachment")
    if factors.lattice_degeneration:
        add("lattice-degeneration", "lattice degeneration")
    if factors.vitreous_loss_at_cataract_surgery:
        add("vitreous-loss", "vitreous loss at the cataract operation")
    if course.spike_grade in ("moderate", "severe"):
        add("iop-spike", f"{course.spike_grade} IOP rise after the laser")
    if course.changes and max(c.value_mmhg for c in course.changes) >= t.iop_high_mmhg.value:
        add("iop-high", f"IOP of {t.iop_high_mmhg.value:g} mmHg or more after the laser")
    if band.index > len(t.total_energy_bands_mj.values):
        add("total-energy", f"total energy in the highest band ({band.label})")
    return Risk(level="raised" if reasons else "routine", reasons=tuple(reasons))


def cumulative(started_at: datetime, energy_mj: float, prior: Sequence[PriorSession]) -> Cumulative:
    """This eye's running totals; prior holds earlier sessions only."""
    earlier = [p for p in prior if p.started_at < started_at]
    last = max((p.started_at for p in earlier), default=None)
    return Cumulative(
        session_number=len(earlier) + 1,
        cumulative_energy_mj=round(energy_mj + math.fsum(p.total_energy_mj for p in earlier), 3),
        days_since_last_session=(started_at.date() - last.date()).days if last else None,
    )


def recounted(before: Sequence[PriorSession], after: Sequence[PriorSession]) -> list[str]:
    """The keys of the sessions, in session order, whose running totals (session number,
    cumulative energy, days since the last) differ between two states of one eye's sessions:
    the later sessions that a session arriving late, amended or voided must correct. Totals
    count by session time, so the order in which sessions arrived never matters."""

    def totals(sessions: Sequence[PriorSession]) -> dict[str, Cumulative]:
        return {s.key: cumulative(s.started_at, s.total_energy_mj, sessions) for s in sessions}

    old, new = totals(before), totals(after)
    ordered = sorted(after, key=lambda s: (s.started_at, s.key))
    return [s.key for s in ordered if s.key in old and old[s.key] != new[s.key]]


def session_reference(note: Note) -> datetime:
    """The time follow-up counts from: the end of the session when known, else its start."""
    return note.ended_at or note.started_at


def derive(note: Note, policy: Policy, prior: Sequence[PriorSession] = ()) -> Derived:
    """Every derived value of one note."""
    t = policy.thresholds
    laser, before, result = note.laser, note.before, note.result
    pulses = total_pulses(laser)
    energy = total_energy_mj(laser)
    band = energy_band(energy, t.total_energy_bands_mj)
    course = iop_course(before.iop, result.iop_after, session_reference(note), t)
    angle, assumed = cone_angle(note, t)
    highest = highest_pulse_energy_mj(laser)
    surgery = before.cataract_surgery_date
    return Derived(
        total_pulses=pulses,
        total_energy_mj=energy,
        mean_pulse_energy_mj=round(energy / pulses, 3),
        highest_pulse_energy_mj=highest,
        energy_band=band,
        opening=(
            opening_size(result.opening, before.iol.optic_diameter_mm)
            if result.opening is not None
            else None
        ),
        days_since_cataract_surgery=(
            days_between(surgery, note.started_at.date()) if surgery is not None else None
        ),
        acuity=acuity_change(before.visual_acuity, result.visual_acuity_after),
        iop=course,
        focal_spot=focal_spot(laser.wavelength_nm, angle, highest, assumed=assumed),
        risk=risk(before.risk_factors, course, band, policy),
        cumulative=cumulative(note.started_at, energy, prior),
        pathway=pressure_pathway(note, t),
    )
