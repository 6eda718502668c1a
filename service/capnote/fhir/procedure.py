"""The Procedure resource for one laser session, with its human-readable narrative."""

from __future__ import annotations

from html import escape
from typing import Any

from capnote.derive import Derived
from capnote.fhir import codes, regions
from capnote.fhir.codes import SNOMED, coding, concept, own
from capnote.fhir.common import (
    PROCEDURE_ROLE,
    Entry,
    VersionContext,
    fhir_identifier,
    identifier_query,
    when,
)
from capnote.note import Complication, Note
from capnote.schedule import DueItem

_PATTERN = {"cruciate": "cruciate", "circular": "circular", "other": "other"}


def complication_concept(c: Complication) -> dict[str, Any]:
    """A complication as a CodeableConcept of the project's codes."""
    if c.kind == "iol-pit":
        code = "iol-pit-visual-axis" if c.on_visual_axis else "iol-pit-peripheral"
    elif c.kind == "other":
        code = "other-complication"
    else:
        code = c.kind
    return concept(own(code), text=c.text or codes.CONCEPTS[code][0])


_SYMPTOM = {
    "reduced-vision": "reduced vision",
    "glare": "glare",
    "reduced-contrast": "reduced contrast",
    "monocular-diplopia": "monocular double vision",
}


def _indication(note: Note) -> list[dict[str, Any]]:
    """The kind of opacification and the symptoms, each only as recorded."""
    found = note.indication
    if found is None:
        return []
    out = []
    if found.opacification is not None:
        out.append(concept(own(f"opacification-{found.opacification}")))
    for symptom in found.symptoms:
        if symptom != "other":
            out.append(concept(text=f"symptom: {_SYMPTOM[symptom]}"))
    if found.symptoms_text is not None:
        out.append(concept(text=f"symptom: {found.symptoms_text}"))
    return out


def _session_notes(note: Note) -> list[str]:
    """What was recorded about how the session was run, in words; nothing not entered."""
    parts: list[str] = []
    laser = note.laser
    if laser.mode == "burst":
        count = f", {laser.pulses_per_burst} pulses per burst" if laser.pulses_per_burst else ""
        parts.append(f"Burst mode{count}")
    elif laser.mode == "single-pulse":
        parts.append("Single-pulse mode")
    if note.before.topical_anaesthetic:
        parts.append(f"topical anaesthetic: {note.before.topical_anaesthetic}")
    if note.before.dilating_drops:
        parts.append("dilating drops: " + ", ".join(note.before.dilating_drops))
    if note.assistant:
        parts.append(f"assistant present: {note.assistant}")
    if note.consent.kind:
        parts.append(f"consent: {note.consent.kind}")
    return ["; ".join(parts) + "."] if parts else []


def _pathway_notes(note: Note, derived: Derived) -> list[str]:
    """The post-laser pressure pathway in words: what is still open, and the discharge."""
    out: list[str] = []
    after = note.result.iop_after
    path = derived.pathway
    if path.open_reading is not None:
        r = after[path.open_reading]
        out.append(
            f"IOP {r.value_mmhg:g} mmHg at {when(r.measured_at)} needed action; no later "
            "reading below the action level and no discharge reason are recorded."
        )
    discharge = note.result.discharge
    if discharge is not None:
        text = f"Discharged at {when(discharge.at)}, cleared by {discharge.cleared_by}"
        if path.discharge_reading is not None:
            r = after[path.discharge_reading]
            text += f"; IOP at discharge {r.value_mmhg:g} mmHg (measured {when(r.measured_at)})"
        else:
            text += "; no IOP reading is recorded before discharge"
        if discharge.reason is not None:
            text += f"; reason: {discharge.reason}"
        out.append(text + ".")
    return out


_TIMING = {
    "before": "before the laser",
    "after": "after the laser",
    "both": "before and after the laser",
}


def _strength(percent: float | None) -> str:
    return f" {percent:g}%" if percent is not None else ""


def _clinical_lines(note: Note) -> list[str]:
    """Complications, drugs and the detachment warning, in words, for the receiver's reader."""
    found = note.result.complications
    named = [c.text or complication_concept(c)["text"] for c in found]
    lines = [f"Complications: {'; '.join(named) if named else 'none recorded'}."]
    plan = note.plan
    drugs = [
        f"{d.agent}{_strength(d.strength_percent)} {_TIMING[d.timing]}" for d in plan.prophylaxis
    ]
    drugs += [
        f"{t.agent}{_strength(t.strength_percent)} {t.dose:g} {t.dose_unit} {t.route} "
        "for a raised IOP"
        for t in note.result.pressure_treatment
    ]
    if drugs:
        lines.append("Drugs given in clinic: " + "; ".join(drugs) + ".")
    home = [
        f"{d.agent}{_strength(d.strength_percent)} {d.times_per_day} times a day for {d.days} days"
        for d in plan.take_home
    ]
    if home:
        lines.append("Drops to take home: " + "; ".join(home) + ".")
    given = "given to the patient" if plan.rd_warning_given else "NOT recorded as given"
    lines.append(f"Retinal detachment warning: {given}.")
    return lines


def _billing_notes(ctx: VersionContext) -> list[str]:
    """The site's CPT global period, where the region codes CPT and the site states one (the
    sources disagree, so capnote never states one itself: clinical-practice.md)."""
    days = ctx.record.cpt_global_period_days
    if ctx.record.region != "united-states" or days is None:
        return []
    return [f"CPT 66821 global period: {days} days (site policy)."]


def _narrative(
    note: Note, derived: Derived, due: list[DueItem], voided: bool = False
) -> dict[str, str]:
    """A short XHTML summary; clinical content only, no identifiers."""
    opening = note.result.opening
    size = "not recorded"
    if opening is not None:
        size = f"{opening.horizontal_mm:g} mm"
        if opening.vertical_mm is not None:
            size += f" x {opening.vertical_mm:g} mm"
    after = ", ".join(f"{r.value_mmhg:g}" for r in note.result.iop_after) or "not measured"
    lines = [
        f"Nd:YAG posterior capsulotomy, {note.eye} eye: {note.result.outcome}.",
        f"{derived.total_pulses} pulses, {derived.total_energy_mj:g} mJ in total "
        f"(highest {derived.highest_pulse_energy_mj:g} mJ per pulse), "
        f"{_PATTERN[note.laser.pattern]} opening {size}.",
        f"IOP {note.before.iop.value_mmhg:g} mmHg before; after: {after} mmHg "
        f"(spike grade {derived.iop.spike_grade}).",
    ]
    if voided:
        # Status is a modifier: the reader must see that this record was withdrawn.
        lines.insert(0, "ENTERED IN ERROR: this record has been voided.")
    lines += _pathway_notes(note, derived)
    lines += _clinical_lines(note)
    lines += [f"{item.title}: {item.target.date().isoformat()}." for item in due]
    lines.append(
        "Thresholds are literature defaults; local protocol and the treating clinician decide."
    )
    body = "".join(f"<p>{escape(line)}</p>" for line in lines)
    return {"status": "generated", "div": f'<div xmlns="http://www.w3.org/1999/xhtml">{body}</div>'}


def procedure(ctx: VersionContext, derived: Derived, due: list[DueItem]) -> Entry:
    """The Procedure: what was done, to which eye, by whom, with what result."""
    note = ctx.note
    outcome_code, outcome_display = codes.OUTCOME[note.result.outcome]
    performed: dict[str, Any] = {"start": when(note.started_at)}
    if note.ended_at is not None:
        performed["end"] = when(note.ended_at)
    used = [concept(own("nd-yag-laser"))]
    lens = note.laser.contact_lens
    if lens.used:
        named = f"Capsulotomy contact lens ({lens.lens})" if lens.lens else None
        used.append(concept(own("capsulotomy-contact-lens"), text=named))
    resource: dict[str, Any] = {
        "resourceType": "Procedure",
        "text": _narrative(note, derived, due, ctx.voided),
        "identifier": [fhir_identifier(note.note_id)],
        # The procedure happened whatever the note's state; a draft note marks its
        # Observations preliminary instead.
        "status": ctx.status("completed"),
        "code": concept(
            coding(SNOMED, codes.DISCISSION_SECONDARY_MEMBRANE, codes.DISCISSION_DISPLAY),
            *regions.procedure_codings(ctx.record.region),
            own("yag-posterior-capsulotomy"),
            text="Nd:YAG laser posterior capsulotomy",
        ),
        "subject": ctx.subject,
    }
    ctx.with_encounter(resource)
    resource["performedPeriod"] = performed
    resource["performer"] = [{"actor": ctx.clinician}]
    location: dict[str, Any] = {"display": note.location.name}
    if note.location.identifier is not None:
        location["identifier"] = fhir_identifier(note.location.identifier)
    resource["location"] = location
    resource["reasonCode"] = [
        concept(
            *regions.diagnosis_codings(ctx.record.region, note.eye),
            own("posterior-capsule-opacification"),
            text="Posterior capsule opacification",
        )
    ]
    resource["reasonCode"] += _indication(note)
    resource["bodySite"] = [
        concept(
            coding(SNOMED, codes.EYE_STRUCTURE[note.eye], codes.EYE_DISPLAY[note.eye]),
            text=f"{note.eye} eye",
        )
    ]
    resource["outcome"] = concept(
        coding(SNOMED, outcome_code, outcome_display), text=note.result.outcome
    )
    if note.result.complications:
        resource["complication"] = [complication_concept(c) for c in note.result.complications]
    if due:
        resource["followUp"] = [
            concept(text=f"{item.title}: {item.target.date().isoformat()}") for item in due
        ]
    resource["usedCode"] = used
    notes = _session_notes(note) + _pathway_notes(note, derived) + _billing_notes(ctx)
    if notes:
        resource["note"] = [{"text": text} for text in notes]
    key = ctx.keys.key(PROCEDURE_ROLE)
    query = identifier_query(note.note_id.system, note.note_id.value)
    return Entry(key, resource, query, PROCEDURE_ROLE)
