"""Clinical checks: settings and findings that should raise a question. Never blocking.

Each threshold comes from the site policy, and each finding names the policy's source.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

from capnote.derive import (
    band_index,
    energy_band,
    iop_rise,
    pressure_pathway,
    spike_grade,
    total_energy_mj,
)
from capnote.findings import Finding
from capnote.note import Note
from capnote.rules.base import Check, Context, above, information, warning


def energy(note: Note, ctx: Context) -> Iterator[Finding]:
    """Pulse energy above the usual, total energy in the higher bands, and in glaucoma."""
    t = ctx.policy.thresholds
    usual = t.usual_pulse_energy_max_mj
    for i, s in enumerate(note.laser.series):
        if above(s.energy_mj, usual):
            yield warning(
                "pulse-energy-above-usual",
                f"laser.series[{i}].energy_mj",
                f"pulse energy {s.energy_mj:g} mJ is above the usual {usual.value:g} mJ",
                "pulse energy is titrated up from a low start",
                value=s.energy_mj,
                allowed=f"<= {usual.value:g} mJ",
                source=usual.source,
            )
    total = total_energy_mj(note.laser)
    index = band_index(total, t.total_energy_bands_mj)
    if index > 1:
        band = energy_band(total, t.total_energy_bands_mj)  # its label, only when shown
        # The middle band alone is within published case series (information by default, see
        # the policy's [severity]); the highest band has a code of its own.
        highest = index > len(t.total_energy_bands_mj.values)
        yield warning(
            "total-energy-highest-band" if highest else "total-energy-band",
            "laser.series",
            f"total energy {total:g} mJ falls in the higher-risk band {band.label}",
            "total energy bands for IOP rise and complications",
            value=total,
            allowed=f"<= {t.total_energy_bands_mj.values[0]:g} mJ",
            source=t.total_energy_bands_mj.source,
        )
    glaucoma = note.before.risk_factors.glaucoma
    limit = t.glaucoma_total_energy_mj
    # glaucoma None (not recorded) runs no glaucoma check: not_recorded() says so.
    if glaucoma in t.glaucoma_severities.values and above(total, limit):
        yield warning(
            "glaucoma-total-energy",
            "laser.series",
            f"total energy {total:g} mJ in a patient with glaucoma ({glaucoma})",
            f"more than {limit.value:g} mJ is linked with a higher IOP after the laser",
            value=total,
            allowed=f"<= {limit.value:g} mJ",
            source=limit.source,
        )


def wavelength(note: Note, ctx: Context) -> Iterator[Finding]:
    """A wavelength other than the Nd:YAG line."""
    expected = ctx.policy.thresholds.wavelength_nm
    if note.laser.wavelength_nm != expected.value:
        yield warning(
            "wavelength-unusual",
            "laser.wavelength_nm",
            f"wavelength {note.laser.wavelength_nm:g} nm is not the Nd:YAG {expected.value:g} nm",
            "posterior capsulotomy uses the Nd:YAG line",
            value=note.laser.wavelength_nm,
            allowed=f"{expected.value:g} nm",
            source=expected.source,
        )


def iop(note: Note, ctx: Context) -> Iterator[Finding]:
    """IOP rise after the laser, a high reading, and no reading at all."""
    t = ctx.policy.thresholds
    if not note.result.iop_after:
        yield warning(
            "iop-after-missing",
            "result.iop_after",
            "no IOP was measured after the laser",
            "IOP is checked after the laser; rises peak within hours",
            source=ctx.policy.schedule.iop_recheck.source,
        )
        return
    before = note.before.iop
    # Only the rise of each reading is needed here, not the whole course that derive() builds.
    for i, reading in enumerate(note.result.iop_after):
        rise = iop_rise(before, reading)
        grade = spike_grade(rise, t)
        if grade in ("moderate", "severe"):
            threshold = t.iop_rise_severe_mmhg if grade == "severe" else t.iop_rise_moderate_mmhg
            yield warning(
                f"iop-rise-{grade}",
                f"result.iop_after[{i}].value_mmhg",
                f"IOP rose {rise:g} mmHg above the pre-laser value ({grade})",
                f"a rise of {threshold.value:g} mmHg or more is a {grade} spike",
                value=reading.value_mmhg,
                allowed=f"rise < {t.iop_rise_moderate_mmhg.value:g} mmHg",
                source=threshold.source,
            )
        if reading.value_mmhg >= t.iop_high_mmhg.value:
            yield warning(
                "iop-high",
                f"result.iop_after[{i}].value_mmhg",
                f"IOP of {reading.value_mmhg:g} mmHg after the laser",
                f"an IOP of {t.iop_high_mmhg.value:g} mmHg or more is checked again next day",
                value=reading.value_mmhg,
                allowed=f"< {t.iop_high_mmhg.value:g} mmHg",
                source=t.iop_high_mmhg.source,
            )


def pressure_action(note: Note, ctx: Context) -> Iterator[Finding]:
    """A reading that needs action (severe rise, or at or over the action level) stays open
    until a later reading is below the action level or the discharge records a reason."""
    t = ctx.policy.thresholds
    path = pressure_pathway(note, t)
    if path.open_reading is None:
        return
    i = path.open_reading
    reading = note.result.iop_after[i]
    treated = bool(note.result.pressure_treatment)
    yield warning(
        "iop-action-unresolved",
        f"result.iop_after[{i}].value_mmhg",
        f"IOP of {reading.value_mmhg:g} mmHg after the laser needs action"
        + (", treatment is recorded" if treated else ", no treatment is recorded")
        + ", and no later reading below the action level (or a discharge reason) is recorded",
        f"a severe rise ({t.iop_rise_severe_mmhg.value:g} mmHg or more) or an IOP of "
        f"{t.iop_high_mmhg.value:g} mmHg or more is treated and re-measured before the "
        "patient leaves",
        value=reading.value_mmhg,
        allowed=f"a later reading < {t.iop_high_mmhg.value:g} mmHg with a rise < "
        f"{t.iop_rise_severe_mmhg.value:g} mmHg, or result.discharge.reason",
        source=f"{t.iop_rise_severe_mmhg.source}; {t.iop_high_mmhg.source}",
    )


# Risk factors whose absence the raised-risk review relies on, with how a finding names them.
_RISK_ITEMS = (
    ("high_myopia", "high myopia"),
    ("uveitis", "uveitis"),
    ("diabetic_macular_oedema", "diabetic macular oedema"),
    ("retinal_detachment_this_eye", "retinal detachment in this eye"),
    ("retinal_detachment_fellow_eye", "retinal detachment in the fellow eye"),
    ("lattice_degeneration", "lattice degeneration"),
    ("vitreous_loss_at_cataract_surgery", "vitreous loss at the cataract operation"),
)


def not_recorded(note: Note, ctx: Context) -> Iterator[Finding]:
    """Items a check depends on that were not recorded: say which checks could not run.

    Not recorded is never read as absent; a signed note also needs glaucoma status
    (rules.limits.signing), so for a final note that error stands instead."""
    factors = note.before.risk_factors
    t = ctx.policy.thresholds
    if factors.glaucoma is None and note.status != "final":
        yield warning(
            "glaucoma-not-recorded",
            "before.risk_factors.glaucoma",
            "glaucoma status not recorded: the glaucoma energy and prophylaxis checks were "
            "not applied",
            "glaucoma status decides the glaucoma total-energy and prophylaxis checks and the "
            "next-day IOP check",
            allowed="none | suspect | mild | moderate | advanced",
            source=t.glaucoma_severities.source,
        )
    missing = [label for field, label in _RISK_ITEMS if getattr(factors, field) is None]
    if missing:
        yield warning(
            "risk-factors-not-recorded",
            "before.risk_factors",
            "not recorded: " + ", ".join(missing) + "; the risk level and review interval "
            "could not take them into account",
            "retinal detachment and CME risk factors raise the level of follow-up",
            allowed="true or false for each",
            source="AAO Preferred Practice Pattern, Cataract in the Adult Eye (RD risk "
            "factors); Steinberg et al., Am J Ophthalmol 1991;112:373",
        )
    for where, acuity in (
        ("before.visual_acuity.correction", note.before.visual_acuity),
        ("result.visual_acuity_after.correction", note.result.visual_acuity_after),
    ):
        if acuity is not None and acuity.correction is None:
            yield information(
                "acuity-correction-not-recorded",
                where,
                "the acuity's correction is not recorded: it is sent as visual acuity of "
                "unstated correction, not as best-corrected acuity",
                "best-corrected, habitual, uncorrected or pinhole",
                source="capnote contract: not recorded is not assumed",
            )
    opening = note.result.opening
    if opening is not None and note.before.iol.optic_diameter_mm is None:
        yield information(
            "optic-diameter-not-recorded",
            "before.iol.optic_diameter_mm",
            "the IOL optic diameter is not recorded: the opening was not compared with it",
            "an opening should not exceed the IOL optic",
            source="from memory: an opening should not exceed the IOL optic (commonly 6 mm)",
        )


def prophylaxis(note: Note, ctx: Context) -> Iterator[Finding]:
    """IOP prophylaxis: expected in glaucoma, noted when absent otherwise."""
    if note.plan.prophylaxis:
        return
    t = ctx.policy.thresholds
    glaucoma = note.before.risk_factors.glaucoma
    if glaucoma in t.glaucoma_severities.values:  # None (not recorded): not_recorded() says
        yield warning(
            "glaucoma-no-prophylaxis",
            "plan.prophylaxis",
            f"no IOP prophylaxis was given to a patient with glaucoma ({glaucoma})",
            "IOP-lowering drops around the laser in glaucoma and glaucoma suspects",
            source=t.glaucoma_severities.source,
        )
    else:
        yield information(
            "no-prophylaxis",
            "plan.prophylaxis",
            "no IOP prophylaxis was given",
            "apraclonidine or brimonidine before and after the laser blunts the IOP rise",
            source="Pollack et al., Arch Ophthalmol 1988;106:754; Gartaganis et al., "
            "Ophthalmic Surg Lasers 1999;30:647",
        )


def optics(note: Note, ctx: Context) -> Iterator[Finding]:
    """No contact lens; focus outside the usual offsets."""
    t = ctx.policy.thresholds
    if not note.laser.contact_lens.used:
        yield warning(
            "no-contact-lens",
            "laser.contact_lens.used",
            "no capsulotomy contact lens was used",
            "a converging contact lens steadies the eye and protects the IOL",
            source="common practice; J Cataract Refract Surg 1990;16:732 (contact lens, low "
            "energy and focus behind the capsule reduce IOL pitting)",
        )
    focus = note.laser.focus
    if focus is None or focus.distance_mm is None:
        return
    usual = t.posterior_offset_mm if focus.method == "posterior-offset" else t.manual_focus_mm
    if not usual.contains(focus.distance_mm):
        yield warning(
            "focus-outside-usual",
            "laser.focus.distance_mm",
            f"focus {focus.distance_mm:g} mm ({focus.method}) is outside the usual "
            f"{usual.describe()}",
            "focusing just behind the capsule protects the IOL",
            value=focus.distance_mm,
            allowed=usual.describe(),
            source=usual.source,
        )


def opening(note: Note, ctx: Context) -> Iterator[Finding]:
    """Opening larger than the optic, smaller than usual, or off centre."""
    found = note.result.opening
    if found is None:
        return
    t = ctx.policy.thresholds
    optic = note.before.iol.optic_diameter_mm
    axes = [("horizontal_mm", found.horizontal_mm)]
    if found.vertical_mm is not None:
        axes.append(("vertical_mm", found.vertical_mm))
    for name, size in axes:
        where = f"result.opening.{name}"
        if optic is not None and size > optic:
            yield warning(
                "opening-larger-than-optic",
                where,
                f"the opening ({size:g} mm) is larger than the IOL optic ({optic:g} mm)",
                "an opening should not exceed the IOL optic",
                value=size,
                allowed=f"<= {optic:g} mm",
                source="from memory: an opening should not exceed the IOL optic (commonly 6 mm)",
            )
        if size < t.opening_min_mm.value:
            yield warning(
                "opening-small",
                where,
                f"the opening ({size:g} mm) is smaller than {t.opening_min_mm.value:g} mm",
                "the opening should clear the visual axis",
                value=size,
                allowed=f">= {t.opening_min_mm.value:g} mm",
                source=t.opening_min_mm.source,
            )
    if found.centred is False:  # None: not recorded, which is not "off centre"
        yield warning(
            "opening-off-centre",
            "result.opening.centred",
            "the opening is not centred on the visual axis",
            "the opening is made over the pupil axis",
            source=t.opening_min_mm.source,
        )


def timing(note: Note, ctx: Context) -> Iterator[Finding]:
    """Treatment soon after the cataract operation; conditions that argue for deferral."""
    t = ctx.policy.thresholds
    surgery = note.before.cataract_surgery_date
    if surgery is not None:
        days = (note.started_at.date() - surgery).days
        if 0 <= days < t.days_after_cataract_surgery.value:
            yield warning(
                "soon-after-cataract-surgery",
                "before.cataract_surgery_date",
                f"the laser comes {days} days after the cataract operation",
                f"capsulotomy is usually deferred for {t.days_after_cataract_surgery.value:g} days",
                value=surgery.isoformat(),
                allowed=f">= {t.days_after_cataract_surgery.value:g} days before the session",
                source=t.days_after_cataract_surgery.source,
            )
    factors = note.before.risk_factors
    if factors.uveitis or factors.diabetic_macular_oedema:
        field = "uveitis" if factors.uveitis else "diabetic_macular_oedema"
        yield warning(
            "cme-risk",
            f"before.risk_factors.{field}",
            "uveitis or macular oedema raises the risk of cystoid macular oedema",
            "defer when there is active inflammation or recent CME",
            source="secondary report: defer with active inflammation or recent CME; "
            "from memory: uveitis raises CME risk",
        )


def safety_net(note: Note, ctx: Context) -> Iterator[Finding]:
    """Warning signs, consent and IOL pits on the visual axis."""
    if not note.plan.rd_warning_given:
        yield warning(
            "rd-warning-not-given",
            "plan.rd_warning_given",
            "the patient was not told the warning signs of retinal detachment",
            "tell the patient about flashes, new floaters or a shadow, and whom to call",
            source="common practice; RD after capsulotomy 0.89 % (Steinberg et al., "
            "Am J Ophthalmol 1991;112:373)",
        )
    if not note.consent.given:
        yield warning(
            "consent-not-recorded",
            "consent.given",
            "consent is not recorded as given",
            "consent is taken before the laser",
            source="common practice",
        )
    for i, c in enumerate(note.result.complications):
        if c.kind == "iol-pit" and c.on_visual_axis:
            yield warning(
                "iol-pit-on-axis",
                f"result.complications[{i}].on_visual_axis",
                "an IOL pit lies on the visual axis",
                "pits on the visual axis can cause lasting glare and halos",
                source="common practice",
            )


CHECKS: Iterable[Check] = (
    not_recorded,
    energy,
    wavelength,
    iop,
    pressure_action,
    prophylaxis,
    optics,
    opening,
    timing,
    safety_net,
)
