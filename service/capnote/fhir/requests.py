"""What follows the session: follow-up ServiceRequests, drops given and drops to take home."""

from __future__ import annotations

from datetime import date, datetime
from typing import Any

from capnote.fhir import codes
from capnote.fhir.codes import SNOMED, coding, concept, own, quantity
from capnote.fhir.common import Entry, VersionContext, keyed, keyed_entry, when
from capnote.note import ClinicDrop, HomeDrop, PressureTreatment
from capnote.schedule import DueItem

_DUE_CODE = {
    "iop-recheck": "iop-recheck",
    "next-day-iop": "next-day-iop-check",
    "review": "capsulotomy-review",
}
_ROUTE = concept(text="ophthalmic")


def _moment(item: DueItem, moment: datetime) -> str:
    """Whole-day items go out as dates, timed ones as date-times in the clinic's zone."""
    return moment.date().isoformat() if item.all_day else when(moment)


def _due_note(item: DueItem) -> str:
    parts = ["Due because: " + "; ".join(item.reasons) + "."]
    moved = item.moved_text(lambda m: _moment(item, m), show_day=date.isoformat)
    if moved is not None:
        parts.append(moved[0].upper() + moved[1:] + ".")
    starts = item.earliest_text(lambda m: _moment(item, m))
    if starts is not None:
        parts.append(starts[0].upper() + starts[1:] + ".")
    if item.flag:
        parts.append(item.flag[0].upper() + item.flag[1:] + ".")
    if item.done_by_reading is not None:
        parts.append("Done: a post-laser reading in this note lies inside the window.")
    return " ".join(parts)


def service_request(ctx: VersionContext, procedure: Entry, item: DueItem) -> Entry:
    """One due item as a ServiceRequest with its window (Timing.repeat.boundsPeriod)."""
    reviewed = item.kind == "review" and ctx.reviewed
    done = item.done_by_reading is not None or reviewed
    role = f"due-{item.kind}"
    key, resource = keyed(ctx, role, "ServiceRequest")
    resource["status"] = ctx.status("completed" if done else "active", draft="draft")
    resource["intent"] = "order"
    resource["code"] = concept(own(_DUE_CODE[item.kind]), text=item.title)
    resource["subject"] = ctx.subject
    ctx.with_encounter(resource)
    resource["occurrenceTiming"] = {
        "event": [_moment(item, item.target)],
        "repeat": {
            "count": 1,
            "boundsPeriod": {
                "start": _moment(item, item.earliest),
                "end": _moment(item, item.latest),
            },
        },
    }
    resource["authoredOn"] = when(ctx.note.ended_at or ctx.note.started_at)
    resource["requester"] = ctx.clinician
    # reasonReference cannot point at a Procedure in R4; supportingInfo takes any resource.
    resource["supportingInfo"] = [procedure.reference]
    said = _due_note(item) + (" Done: the review visit was recorded." if reviewed else "")
    resource["note"] = [{"text": said}]
    return keyed_entry(key, resource, role)


def _eye_site(eye: str) -> dict[str, Any]:
    """dosage.site for a drop: the eye treated, coded as the Procedure's bodySite is
    (SNOMED CT eye structures, coding.md [confirmed])."""
    return concept(
        coding(SNOMED, codes.EYE_STRUCTURE[eye], codes.EYE_DISPLAY[eye]), text=f"{eye} eye"
    )


def _drug(agent: str, strength: float | None) -> dict[str, Any]:
    strength_text = f" {strength:g}%" if strength is not None else ""
    return concept(text=f"{agent}{strength_text} eye drops")


# Short, so a drop's role fits a read API id (capnote.fhir.identity).
_WHEN_ROLE = {"before": "pre", "after": "post"}


def administrations(
    ctx: VersionContext, procedure: Entry, drop: ClinicDrop, name: str
) -> list[Entry]:
    """A prophylaxis drop given in clinic: one administration per time it was given."""
    note = ctx.note
    moments = {
        "before": [("before", note.started_at)],
        "after": [("after", note.ended_at or note.started_at)],
    }
    moments["both"] = moments["before"] + moments["after"]
    out = []
    for label, moment in moments[drop.timing]:
        role = f"{name}-{_WHEN_ROLE[label]}"
        key, resource = keyed(ctx, role, "MedicationAdministration")
        resource["status"] = ctx.status("completed")
        resource["partOf"] = [procedure.reference]
        resource["medicationCodeableConcept"] = _drug(drop.agent, drop.strength_percent)
        resource["subject"] = ctx.subject
        ctx.with_encounter(resource, "context")
        resource["effectiveDateTime"] = when(moment)
        resource["performer"] = [{"actor": ctx.clinician}]
        resource["dosage"] = {
            "text": f"one drop to the {note.eye} eye {label} the laser",
            "site": _eye_site(note.eye),
            "route": _ROUTE,
            "dose": quantity(1, "drop", "{drop}"),
        }
        out.append(keyed_entry(key, resource, role))
    return out


_TREATMENT_ROUTE = {
    "topical": concept(text="ophthalmic (topical to the eye)"),
    "oral": concept(text="oral"),
    "intravenous": concept(text="intravenous"),
}
_DOSE_UNIT = {"drop": ("drop", "{drop}"), "mg": ("mg", "mg")}


def pressure_treatment(
    ctx: VersionContext,
    procedure: Entry,
    given: PressureTreatment,
    role: str,
    reason: Entry | None,
) -> Entry:
    """A treatment given in clinic for a raised IOP after the laser, as given."""
    key, resource = keyed(ctx, role, "MedicationAdministration")
    resource["status"] = ctx.status("completed")
    resource["category"] = concept(own("iop-treatment"))
    resource["partOf"] = [procedure.reference]
    strength = f" {given.strength_percent:g}%" if given.strength_percent is not None else ""
    resource["medicationCodeableConcept"] = concept(text=f"{given.agent}{strength}")
    resource["subject"] = ctx.subject
    ctx.with_encounter(resource, "context")
    resource["effectiveDateTime"] = when(given.given_at)
    resource["performer"] = [{"actor": ctx.clinician}]
    if reason is not None:
        # R4 MedicationAdministration.reasonReference takes an Observation: the reading.
        resource["reasonReference"] = [reason.reference]
    unit, code = _DOSE_UNIT[given.dose_unit]
    dosage: dict[str, Any] = {
        "text": f"{given.dose:g} {unit} {given.route} for a raised IOP after the laser"
    }
    if given.route == "topical":
        dosage["site"] = _eye_site(ctx.note.eye)
    dosage["route"] = _TREATMENT_ROUTE[given.route]
    dosage["dose"] = quantity(given.dose, unit, code)
    resource["dosage"] = dosage
    return keyed_entry(key, resource, role)


def medication_request(ctx: VersionContext, procedure: Entry, drop: HomeDrop, role: str) -> Entry:
    """Drops to take home, with how often and for how long."""
    note = ctx.note
    key, resource = keyed(ctx, role, "MedicationRequest")
    resource["status"] = ctx.status("active", draft="draft")
    resource["intent"] = "order"
    resource["medicationCodeableConcept"] = _drug(drop.agent, drop.strength_percent)
    resource["subject"] = ctx.subject
    ctx.with_encounter(resource)
    resource["authoredOn"] = when(note.ended_at or note.started_at)
    resource["requester"] = ctx.clinician
    # As for ServiceRequest: the Procedure is supporting information, not a reason.
    resource["supportingInformation"] = [procedure.reference]
    resource["dosageInstruction"] = [
        {
            "text": f"one drop to the {note.eye} eye {drop.times_per_day} times a day "
            f"for {drop.days} days",
            "timing": {
                "repeat": {
                    "boundsDuration": quantity(drop.days, "days", "d"),
                    "frequency": drop.times_per_day,
                    "period": 1,
                    "periodUnit": "d",
                }
            },
            "site": _eye_site(note.eye),
            "route": _ROUTE,
            "doseAndRate": [{"doseQuantity": quantity(1, "drop", "{drop}")}],
        }
    ]
    return keyed_entry(key, resource, role)
