"""One note's FHIR R4 transaction Bundle: safe to send twice.

Every fullUrl is a urn:uuid derived from the note identifier and the resource's role, and
every entry's request carries ifNoneExist on its identifier, so a receiver that honours
conditional create makes nothing new when the same note arrives again.
"""

from __future__ import annotations

from enum import StrEnum
from functools import lru_cache
from typing import Any

from capnote.derive import Derived
from capnote.errors import EmissionError
from capnote.fhir.bindings import status_problem
from capnote.fhir.codes import CONDITION_ENTERED_IN_ERROR, RESOURCE_KEY
from capnote.fhir.common import Emitted, Entry, Version, VersionContext, key_query
from capnote.fhir.identity import (
    prophylaxis_roles,
    reading_roles,
    take_home_roles,
    treatment_roles,
)
from capnote.fhir.narrative import narrative
from capnote.fhir.observations import observations
from capnote.fhir.procedure import procedure
from capnote.fhir.profiles import profile_for
from capnote.fhir.requests import (
    administrations,
    medication_request,
    pressure_treatment,
    service_request,
)
from capnote.note import Note
from capnote.policy.model import RecordPolicy
from capnote.schedule import DueItem


def entries(
    note: Note,
    derived: Derived,
    due: list[DueItem],
    version: Version | None = None,
    ctx: VersionContext | None = None,
) -> list[Entry]:
    """Every resource for the note version, the Procedure first."""
    ctx = ctx or VersionContext(note, version)
    proc = procedure(ctx, derived, due)
    made = observations(ctx, proc, derived)
    out = [proc, *made]
    out += [service_request(ctx, proc, item) for item in due]
    plan = note.plan
    for name, drop in zip(prophylaxis_roles(plan.prophylaxis), plan.prophylaxis, strict=True):
        out += administrations(ctx, proc, drop, name)
    by_role = {e.role: e for e in made}
    reading = reading_roles(note.result.iop_after)
    given = note.result.pressure_treatment
    for i, (role, treatment) in enumerate(zip(treatment_roles(given), given, strict=True)):
        reason = derived.pathway.treated_reading[i]
        entry = by_role.get(reading[reason]) if reason is not None else None
        out.append(pressure_treatment(ctx, proc, treatment, role, entry))
    out += [
        medication_request(ctx, proc, drop, role)
        for role, drop in zip(take_home_roles(plan.take_home), plan.take_home, strict=True)
    ]
    return out


def request_of(entry: Entry, version: int) -> dict[str, str]:
    """Version 1 creates if absent; later versions update what the receiver holds, found by
    the same identifier search (conditional update), so every resend stays harmless."""
    kind = entry.resource["resourceType"]
    if version == 1:
        return {"method": "POST", "url": kind, "ifNoneExist": entry.if_none_exist}
    return {"method": "PUT", "url": f"{kind}?{entry.if_none_exist}"}


# What a resource that an amendment no longer has becomes at the receiver.
_WITHDRAWN = {
    "ServiceRequest": "revoked",
    "MedicationRequest": "cancelled",
    "Observation": "entered-in-error",
    "MedicationAdministration": "entered-in-error",
    "Procedure": "entered-in-error",
}


def withdrawn(previous: Emitted, kept: set[str]) -> list[Entry]:
    """The previous version's resources this version dropped, each with a status that says
    so: an amendment that removes a next-day check must not leave it active elsewhere."""
    out = []
    for entry, role in zip(previous.bundle.get("entry", []), previous.roles, strict=True):
        key = entry["fullUrl"].removeprefix("urn:uuid:")
        # A version's Provenance stays what it was: the record of that version.
        if key in kept or entry["resource"]["resourceType"] == "Provenance":
            continue
        out.append(Entry(key, withdrawn_resource(entry["resource"]), key_query(key), role))
    return out


def withdrawn_resource(resource: dict[str, Any]) -> dict[str, Any]:
    """A copy of a resource, marked withdrawn (entered in error, revoked or cancelled)."""
    out = dict(resource)
    if out["resourceType"] == "Condition":
        # A Condition has no status: its verification says entered in error, and then it
        # carries no clinical status (R4 invariant con-5).
        out.pop("clinicalStatus", None)
        out["verificationStatus"] = CONDITION_ENTERED_IN_ERROR
    else:
        out["status"] = _WITHDRAWN[out["resourceType"]]
    return out


# Where an Observation holds what was measured or worked out.
_VALUE = ("valueQuantity", "valueString", "valueCodeableConcept", "valueInteger", "component")
# Statuses an unchanged Observation keeps from the version before.
_KEPT = frozenset({"final", "amended", "corrected"})


def restatused(items: list[Entry], previous: Emitted) -> None:
    """Mark, in an amendment of a signed note, only the Observations it changed.

    Unchanged, an Observation keeps the status it had; changed, a measurement whose value
    changed is ``corrected`` (R4 ObservationStatus: modified to correct an error in the
    result) and anything else ``amended`` (modified, including new information: a derived
    value counted again, a time or method put right); a new one is ``final``. Marking
    every Observation amended after any change would tell the receiver that results moved
    which nobody touched."""
    before = {
        e["fullUrl"].removeprefix("urn:uuid:"): e["resource"]
        for e in previous.bundle.get("entry", [])
    }
    for item in items:
        resource, old = item.resource, before.get(item.key)
        if resource["resourceType"] != "Observation" or old is None:
            continue
        if _without_status(resource) == _without_status(old):
            resource["status"] = old["status"] if old["status"] in _KEPT else "amended"
        elif "derivedFrom" not in resource and any(resource.get(k) != old.get(k) for k in _VALUE):
            resource["status"] = "corrected"
        else:
            resource["status"] = "amended"


def _without_status(resource: dict[str, Any]) -> dict[str, Any]:
    # The narrative is left out too: it restates the status, and a version stored before
    # Observations had one must not look changed for want of it.
    return {k: v for k, v in resource.items() if k not in ("status", "text")}


class OutputCheck(StrEnum):
    """How each emitted Bundle is checked before it leaves (setting CAPNOTE_OUTPUT_CHECK)."""

    # The required code bindings that follow the note's state: each resource's status
    # (fhir.resources does not enforce bindings); the builders' structure and literal codes
    # are proven in tests against R4B and google-fhir-r4 over generated notes.
    BINDINGS = "bindings"
    # Also the whole Bundle through the fhir.resources R4B models, on every request: about
    # four times the cost of emitting it (bench/run.py measures both).
    R4B = "r4b"


def check_output(result: dict[str, Any], items: list[Entry], level: OutputCheck) -> None:
    """Raise EmissionError when the Bundle about to leave breaks a rule (a bug, never input)."""
    # Of the codes under required bindings, only each resource's status follows the note's
    # state (draft, signed, amended, voided, withdrawn); every other one (the Bundle's type,
    # request methods, intents, narrative status, units of time) is a literal of the
    # builders, checked against the core package's value sets by the tests.
    problems = [
        f"{loc} = {value!r} (ValueSet {vs})"
        for e in items
        if (found := status_problem(e.resource)) is not None
        for loc, value, vs in [found]
    ]
    if level is OutputCheck.R4B and not problems:
        # Imported on first use: the R4B models take a tenth of a second to load, and only
        # this setting needs them here.
        from capnote.fhir.validate import validate_resource

        problems = [f"{f.location}: {f.message}" for f in validate_resource(result) if f.blocking]
    if problems:
        raise EmissionError("emitted FHIR breaks a rule: " + ", ".join(problems))


def emit(
    note: Note,
    derived: Derived,
    due: list[DueItem],
    version: Version | None = None,
    check: OutputCheck = OutputCheck.BINDINGS,
    record: RecordPolicy | None = None,
) -> Emitted:
    """The transaction Bundle and its entries' roles, coded and linked as the site's record
    policy says (the shipped default without one); raises EmissionError rather than emit a
    bad code."""
    # No id or version here: a receiver assigns its own, and a conditional update must not
    # carry an id that may differ from the matched resource's. The read API adds both to
    # meta, which here holds only the profile.
    version = version or Version()
    ctx = VersionContext(note, version, record)
    items = entries(note, derived, due, version, ctx)
    for e in items:
        url = profile(e.resource)
        if url is not None:
            # The profile it conforms to (schemas/fhir-package), so a receiver can check it.
            e.resource["meta"] = {"profile": [url]}
    if version.previous is not None:
        if ctx.amended:
            restatused(items, version.previous)
        items += withdrawn(version.previous, {e.key for e in items})
    for e in items:
        # Written last, once every status is settled: the narrative states the status, a
        # modifier element (R4 narrative.html), so a withdrawn resource's says withdrawn.
        text = narrative(e.resource)
        if text is not None:
            e.resource["text"] = text
    result: dict[str, Any] = {
        "resourceType": "Bundle",
        "identifier": {"system": RESOURCE_KEY, "value": ctx.keys.key("bundle")},
        "type": "transaction",
        "entry": [
            {
                "fullUrl": e.full_url,
                "resource": e.resource,
                "request": request_of(e, version.number),
            }
            for e in items
        ],
    }
    check_output(result, items, check)
    return Emitted(result, tuple(e.role for e in items))


def profile(resource: dict[str, Any]) -> str | None:
    """profile_for, looked up once per type and code (a Bundle holds about twenty)."""
    code = resource.get("code")
    codings = tuple((c.get("system"), c.get("code")) for c in (code or {}).get("coding", ()) if c)
    return _profile_of(resource["resourceType"], codings)


@lru_cache(maxsize=512)
def _profile_of(kind: str, codings: tuple[tuple[str | None, str | None], ...]) -> str | None:
    code = {"coding": [{"system": s, "code": c} for s, c in codings]}
    return profile_for({"resourceType": kind, "code": code})


def bundle(
    note: Note, derived: Derived, due: list[DueItem], version: Version | None = None
) -> dict[str, Any]:
    """The transaction Bundle alone (see emit)."""
    return emit(note, derived, due, version).bundle
