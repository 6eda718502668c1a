"""Observations of one session: IOP, acuity, laser dose, opening, and derived estimates.

Each is partOf the Procedure; computed values carry derivedFrom links to their inputs.
"""

from __future__ import annotations

from typing import Any

from capnote.acuity import QUALITATIVE
from capnote.derive import Derived
from capnote.fhir import codes
from capnote.fhir.codes import LOINC, OBS_CATEGORY, SNOMED, coding, concept, own, quantity
from capnote.fhir.common import Entry, VersionContext, keyed, keyed_entry, when
from capnote.fhir.identity import reading_roles, series_roles
from capnote.note import IopReading, VisualAcuity

_METHOD = {
    "applanation": "applanation tonometry",
    "rebound": "rebound tonometry",
    "non-contact": "non-contact tonometry",
    "other": "other tonometry",
}


# Built once and shared by every Observation (never mutated): category and eye codes.
_CATEGORY = {
    c: concept(coding(OBS_CATEGORY, c, codes.OBS_CATEGORY_DISPLAY[c]))
    for c in ("exam", "procedure")
}
_BODY_SITE = {
    eye: concept(coding(SNOMED, codes.EYE_STRUCTURE[eye], codes.EYE_DISPLAY[eye]))
    for eye in codes.EYE_STRUCTURE
}


class ObservationMaker:
    """Builds the Observations of one note, sharing status, subject and partOf."""

    def __init__(self, ctx: VersionContext, procedure: Entry) -> None:
        self.ctx = ctx
        self.procedure = procedure
        # An amendment marks only what it changed (capnote.fhir.bundle.restatused).
        self.status = ctx.status("final", draft="preliminary")
        self.part_of = [procedure.reference]
        self.performer = [ctx.clinician]
        self.body_site = _BODY_SITE[ctx.note.eye]

    def make(
        self,
        role: str,
        category: str,
        code: dict[str, Any],
        effective: str,
        value: dict[str, Any] | None = None,
        **extra: Any,
    ) -> Entry:
        """One Observation; value is a ``{"valueX": ...}`` dict or None."""
        key, resource = keyed(self.ctx, role, "Observation")
        resource["status"] = self.status
        resource["partOf"] = self.part_of
        resource["category"] = [_CATEGORY[category]]
        resource["code"] = code
        resource["subject"] = self.ctx.subject
        self.ctx.with_encounter(resource)
        resource["effectiveDateTime"] = effective
        resource["performer"] = self.performer
        if value:
            resource.update(value)
        resource.update(extra)
        if "bodySite" not in resource:
            resource["bodySite"] = self.body_site
        return keyed_entry(key, resource, role)

    def iop(self, role: str, reading: IopReading, fallback: str) -> Entry:
        """An IOP reading, coded by eye."""
        effective = when(reading.measured_at) if reading.measured_at else fallback
        return self.make(role, "exam", iop_code(self.ctx.note.eye), effective, **iop_value(reading))

    def acuity(
        self, role: str, entered: VisualAcuity, logmar: float | None, effective: str
    ) -> Entry:
        """Visual acuity as entered, with its logMAR (derived already) as a component."""
        code, value = acuity_coded(self.ctx.note.eye, entered, logmar)
        return self.make(role, "exam", code, effective, **value)


def iop_code(eye: str) -> dict[str, Any]:
    """The code of an IOP reading of one eye: LOINC by eye and the SNOMED CT observable."""
    return concept(
        coding(LOINC, codes.IOP_BY_EYE[eye], codes.IOP_BY_EYE_DISPLAY[eye]),
        coding(SNOMED, codes.IOP_OBSERVABLE, codes.IOP_OBSERVABLE_DISPLAY),
        text=f"Intraocular pressure, {eye} eye",
    )


def iop_value(reading: IopReading) -> dict[str, Any]:
    """An IOP Observation's value and method."""
    return {
        "valueQuantity": quantity(reading.value_mmhg, "mmHg", "mm[Hg]"),
        "method": concept(text=_METHOD[reading.method]),
    }


def acuity_coded(
    eye: str, entered: VisualAcuity, logmar: float | None
) -> tuple[dict[str, Any], dict[str, Any]]:
    """A visual acuity Observation's code, and its value as entered with the logMAR
    (derived already) as a component."""
    # The best-corrected LOINC code only for a correction recorded as best-corrected: a
    # correction not recorded is sent as acuity of unstated correction, never assumed.
    snellen_bcva = entered.correction == "best-corrected" and entered.notation.startswith("snellen")
    correction = entered.correction or "correction not recorded"
    label = f"Visual acuity ({correction}, {entered.notation}), {eye} eye"
    code = (
        concept(
            coding(LOINC, codes.BCVA_SNELLEN_BY_EYE[eye], codes.BCVA_SNELLEN_DISPLAY[eye]),
            text=label,
        )
        if snellen_bcva
        else concept(own("visual-acuity"), text=label)
    )
    value: dict[str, Any] = {"valueString": QUALITATIVE.get(entered.value.upper(), entered.value)}
    if logmar is not None:
        value["component"] = [part("logmar", quantity(logmar, "logMAR", "{logMAR}"))]
    return code, value


def observations(ctx: VersionContext, procedure: Entry, derived: Derived) -> list[Entry]:
    """Every Observation for the note, inputs before the values derived from them."""
    note = ctx.note
    make = ObservationMaker(ctx, procedure)
    start = when(note.started_at)
    finish = when(note.ended_at or note.started_at)
    out: list[Entry] = []

    before = make.iop("iop-before", note.before.iop, start)
    out.append(before)
    readings = note.result.iop_after
    after = [
        make.iop(role, r, finish) for role, r in zip(reading_roles(readings), readings, strict=True)
    ]
    out += after
    if note.before.visual_acuity is not None:
        logmar = derived.acuity.before_logmar
        out.append(make.acuity("acuity-before", note.before.visual_acuity, logmar, start))
    if note.result.visual_acuity_after is not None:
        logmar = derived.acuity.after_logmar
        out.append(make.acuity("acuity-after", note.result.visual_acuity_after, logmar, finish))

    series = [
        make.make(
            role,
            "procedure",
            concept(own("laser-series")),
            start,
            component=[
                part("pulse-energy", quantity(s.energy_mj, "mJ", "mJ")),
                part("pulse-count", quantity(s.pulses, "pulses", "{pulses}")),
            ],
        )
        for role, s in zip(series_roles(note.laser.series), note.laser.series, strict=True)
    ]
    out += series
    from_series = [e.reference for e in series]
    out.append(
        make.make(
            "total-energy",
            "procedure",
            concept(own("total-energy")),
            start,
            {"valueQuantity": quantity(derived.total_energy_mj, "mJ", "mJ")},
            derivedFrom=from_series,
        )
    )
    out.append(
        make.make(
            "total-pulses",
            "procedure",
            concept(own("total-pulses")),
            start,
            {"valueQuantity": quantity(derived.total_pulses, "pulses", "{pulses}")},
            derivedFrom=from_series,
        )
    )
    spot = derived.focal_spot
    assumed = " (cone angle assumed)" if spot.cone_angle_assumed else ""
    out.append(
        make.make(
            "focal-fluence",
            "procedure",
            concept(own("focal-fluence-idealised")),
            start,
            {"valueQuantity": quantity(_sig(spot.peak_fluence_j_cm2), "J/cm2", "J/cm2")},
            derivedFrom=from_series,
            component=[
                part(
                    "focal-spot-diameter-idealised",
                    quantity(round(spot.airy_diameter_um, 1), "um", "um"),
                ),
            ],
            note=[
                {
                    "text": "Idealised diffraction-limited estimate for "
                    f"{spot.pulse_energy_mj:g} mJ at a {spot.cone_angle_deg:g} degree cone"
                    f"{assumed}; not a measurement."
                }
            ],
        )
    )
    cumulative = derived.cumulative
    out.append(
        make.make(
            "cumulative-energy",
            "procedure",
            concept(own("cumulative-energy")),
            start,
            {"valueQuantity": quantity(cumulative.cumulative_energy_mj, "mJ", "mJ")},
            derivedFrom=from_series,
            component=_cumulative_components(derived),
        )
    )

    opening = note.result.opening
    if opening is not None and derived.opening is not None:
        # Only what was measured: a round opening has one diameter, never a vertical copy.
        diameters = [
            part("opening-diameter-horizontal", quantity(opening.horizontal_mm, "mm", "mm"))
        ]
        if opening.vertical_mm is not None:
            diameters.append(
                part("opening-diameter-vertical", quantity(opening.vertical_mm, "mm", "mm"))
            )
        size = make.make(
            "opening-size", "exam", concept(own("opening-size")), finish, component=diameters
        )
        out.append(size)
        area_extra: dict[str, Any] = {}
        if derived.opening.round_assumed:
            # The assumption behind a derived value is stated in the resource (R4 Observation.note).
            area_extra["note"] = [
                {"text": "One diameter was measured: the area assumes a round opening."}
            ]
        if derived.opening.ratio_to_optic is not None:
            area_extra["component"] = [
                {
                    "code": concept(own("opening-optic-diameter-ratio")),
                    "valueQuantity": quantity(derived.opening.ratio_to_optic, "ratio", "1"),
                }
            ]
        out.append(
            make.make(
                "opening-area",
                "exam",
                concept(own("opening-area")),
                finish,
                {"valueQuantity": quantity(derived.opening.area_mm2, "mm2", "mm2")},
                derivedFrom=[size.reference],
                **area_extra,
            )
        )

    highest = derived.iop.highest
    if highest is not None:
        grade = derived.iop.spike_grade
        out.append(
            make.make(
                "iop-change",
                "exam",
                concept(own("iop-change")),
                when(note.result.iop_after[highest.reading_index].measured_at),
                {"valueQuantity": quantity(highest.change_mmhg, "mmHg", "mm[Hg]")},
                derivedFrom=[before.reference, after[highest.reading_index].reference],
                component=[
                    {
                        "code": concept(own("iop-spike-grade")),
                        "valueCodeableConcept": concept(own(f"spike-{grade}")),
                    },
                ],
            )
        )
    return out


def part(code: str, value: dict[str, Any]) -> dict[str, Any]:
    """An Observation.component: one of our codes with a Quantity."""
    return {"code": concept(own(code)), "valueQuantity": value}


def _cumulative_components(derived: Derived) -> list[dict[str, Any]]:
    c = derived.cumulative
    parts: list[dict[str, Any]] = [
        {"code": concept(own("session-number")), "valueInteger": c.session_number}
    ]
    if c.days_since_last_session is not None:
        parts.append(
            part("days-since-last-session", quantity(c.days_since_last_session, "days", "d"))
        )
    return parts


def _sig(value: float, digits: int = 3) -> float:
    """Round to significant figures: an idealised estimate claims no more precision."""
    return float(f"{value:.{digits}g}")
