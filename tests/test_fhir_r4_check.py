"""Tests of the independent FHIR R4 checker (tests/fhir_r4_check.py).

The checker is the suite's outside opinion on the FHIR the service emits, so
these tests pin down that it really rejects what FHIR R4 4.0.1 forbids and
accepts ordinary valid content.  Most rejected cases are an accepted resource
with exactly one thing broken, so each one is a test that could fail: the
unbroken original is asserted clean in ``test_accepts_valid_resources``.
Each case names the part of FHIR R4 (4.0.1) it comes from.
"""

from __future__ import annotations

import copy
import json
import time
from collections.abc import Callable
from typing import Any

import pytest
from fhirpathpy.engine.invocations import invocation_registry
from fhirpathpy.parser import parse
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.fhir_r4_check import (
    _SKIPPED_INVARIANTS,
    _UNEXPANDABLE_VALUE_SETS,
    _expand,
    _package_files,
    _package_json,
    _UnexpandableError,
    r4_problems,
)

Resource = dict[str, Any]

XHTML_DIV = '<div xmlns="http://www.w3.org/1999/xhtml"><p>YAG capsulotomy, right eye</p></div>'
UCUM = "http://unitsofmeasure.org"
LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"

# --- valid resources ---------------------------------------------------------

# FHIR R4 Procedure: status 1..1 (event-status, required), subject 1..1.
PROCEDURE: Resource = {
    "resourceType": "Procedure",
    "status": "completed",
    "subject": {"reference": "Patient/example"},
}

# FHIR R4 Observation: status 1..1 (observation-status), code 1..1; Quantity with
# a UCUM code carries the UCUM system (qty-3).
OBSERVATION: Resource = {
    "resourceType": "Observation",
    "status": "final",
    "code": {
        "coding": [{"system": LOINC, "code": "56844-4", "display": "Intraocular pressure of Eye"}]
    },
    "subject": {"reference": "Patient/example"},
    "valueQuantity": {"value": 15, "unit": "mmHg", "system": UCUM, "code": "mm[Hg]"},
}

# FHIR R4 ServiceRequest: status (request-status), intent (request-intent), subject.
SERVICE_REQUEST: Resource = {
    "resourceType": "ServiceRequest",
    "status": "active",
    "intent": "order",
    "code": {"coding": [{"system": SNOMED, "code": "172543007"}], "text": "Nd:YAG capsulotomy"},
    "subject": {"reference": "Patient/example"},
}

# FHIR R4 MedicationRequest: status, intent (medicationrequest-intent), medication[x], subject.
MEDICATION_REQUEST: Resource = {
    "resourceType": "MedicationRequest",
    "status": "active",
    "intent": "order",
    "medicationCodeableConcept": {"text": "apraclonidine 1% eye drops"},
    "subject": {"reference": "Patient/example"},
    "authoredOn": "2024-05-01T09:30:00+02:00",
}

# FHIR R4 MedicationAdministration: status (medication-admin-status), medication[x],
# subject, effective[x]; dosage needs dose or rate (mad-1).
MEDICATION_ADMINISTRATION: Resource = {
    "resourceType": "MedicationAdministration",
    "status": "completed",
    "medicationCodeableConcept": {"text": "apraclonidine 1% eye drops"},
    "subject": {"reference": "Patient/example"},
    "effectiveDateTime": "2024-05-01T09:35:00+02:00",
    "dosage": {"dose": {"value": 1, "unit": "drop"}},
}

# FHIR R4 OperationOutcome: issue 1..* with severity (issue-severity) and code (issue-type).
OPERATION_OUTCOME: Resource = {
    "resourceType": "OperationOutcome",
    "issue": [{"severity": "error", "code": "invalid", "diagnostics": "laser energy missing"}],
}


def _transaction(*resources: Resource) -> Resource:
    """FHIR R4 Bundle of type transaction: every entry has a request (bdl-3)."""
    return {
        "resourceType": "Bundle",
        "type": "transaction",
        "entry": [
            {
                "fullUrl": f"urn:uuid:6f1c2a3e-0000-4000-8000-{index:012x}",
                "resource": resource,
                "request": {
                    "method": "POST",
                    "url": resource["resourceType"],
                    "ifNoneExist": f"identifier=urn:example|{index}",
                },
            }
            for index, resource in enumerate(resources)
        ],
    }


TRANSACTION = _transaction(PROCEDURE, OBSERVATION)


def _with(base: Resource, **changes: Any) -> Resource:
    """A deep copy of ``base`` with top-level properties set (or removed, with None)."""
    result = copy.deepcopy(base)
    for key, value in changes.items():
        if value is None:
            result.pop(key, None)
        else:
            result[key] = value
    return result


def _edit(base: Resource, change: Callable[[Resource], object]) -> Resource:
    """A deep copy of ``base`` changed in place by ``change`` (for nested edits)."""
    result = copy.deepcopy(base)
    change(result)
    return result


ACCEPTED: list[tuple[str, Resource]] = [
    # FHIR R4 Procedure minimal: status + subject.
    ("procedure", PROCEDURE),
    # FHIR R4 Observation with valueQuantity in UCUM mm[Hg].
    ("observation", OBSERVATION),
    # FHIR R4 ServiceRequest minimal.
    ("service-request", SERVICE_REQUEST),
    # FHIR R4 MedicationRequest with medicationCodeableConcept.
    ("medication-request", MEDICATION_REQUEST),
    # FHIR R4 MedicationAdministration minimal with dosage.dose (mad-1).
    ("medication-administration", MEDICATION_ADMINISTRATION),
    # FHIR R4 OperationOutcome minimal.
    ("operation-outcome", OPERATION_OUTCOME),
    # FHIR R4 Bundle transaction: urn:uuid fullUrls, entry.request POST + ifNoneExist.
    ("transaction-bundle", TRANSACTION),
    # FHIR R4 Narrative: status generated, div is an XHTML div with content (txt-1, txt-2).
    ("narrative", _with(PROCEDURE, text={"status": "generated", "div": XHTML_DIV})),
    # FHIR R4 Narrative txt-1: tables, classes, style attributes, images are allowed;
    # an HTML entity (&nbsp;) stands for its character.
    (
        "narrative-rich",
        _with(
            PROCEDURE,
            text={
                "status": "additional",
                "div": '<div xmlns="http://www.w3.org/1999/xhtml" lang="en" xml:lang="en">'
                '<table class="grid"><tr><th style="text-align:left">Energy</th>'
                "<td>1.8&nbsp;mJ &amp; 42 shots</td></tr></table>"
                '<img src="#sketch" alt="sketch"/></div>',
            },
        ),
    ),
    # FHIR R4 observation-status is hierarchical: 'corrected' is nested under 'amended'.
    ("observation-status-nested-code", _with(OBSERVATION, status="corrected")),
    # FHIR R4 medicationrequest-intent: 'filler-order' is nested under 'order'.
    ("intent-nested-code", _with(MEDICATION_REQUEST, intent="filler-order")),
    # FHIR R4 dom-3 / ref-1: a contained resource referenced by '#id' from the container.
    (
        "contained-referenced",
        _with(
            PROCEDURE,
            contained=[
                {"resourceType": "Practitioner", "id": "surgeon", "name": [{"text": "Dr A"}]}
            ],
            performer=[{"actor": {"reference": "#surgeon"}}],
        ),
    ),
    # FHIR R4 JSON primitives: a value with an extension in the '_' property; ext-1.
    (
        "primitive-extension",
        _with(
            PROCEDURE,
            _status={"extension": [{"url": "http://example.org/fhir/ext", "valueString": "x"}]},
        ),
    ),
    # FHIR R4 Observation.component: a code different from Observation.code (obs-7).
    (
        "component",
        _with(
            OBSERVATION,
            valueQuantity=None,
            component=[
                {
                    "code": {"coding": [{"system": LOINC, "code": "8480-6"}]},
                    "valueQuantity": {
                        "value": 120,
                        "unit": "mmHg",
                        "system": UCUM,
                        "code": "mm[Hg]",
                    },
                }
            ],
        ),
    ),
    # FHIR R4 Period: start before end (per-1); dateTime with a time has a zone.
    (
        "period",
        _with(
            PROCEDURE,
            performedPeriod={
                "start": "2024-05-01T09:30:00+02:00",
                "end": "2024-05-01T09:40:00+02:00",
            },
        ),
    ),
    # FHIR R4 Reference: display only is a valid reference (ref-1 is undecided, not false).
    ("display-only-reference", _with(PROCEDURE, recorder={"display": "Dr A"})),
]


@pytest.mark.parametrize(("name", "resource"), ACCEPTED, ids=[name for name, _ in ACCEPTED])
def test_accepts_valid_resources(name: str, resource: Resource) -> None:
    assert r4_problems(resource) == []


# --- invalid resources -------------------------------------------------------

REJECTED: list[tuple[str, Resource, tuple[str, ...]]] = [
    # FHIR R4 4.0.1 Procedure.status required binding, ValueSet event-status.
    (
        "procedure-status-done",
        _with(PROCEDURE, status="done"),
        (
            "Procedure.status: 'done' not in required value set http://hl7.org/fhir/ValueSet/event-status",
            "google-fhir-r4 structural check: Failed to convert 'done' to EventStatusCode",
        ),
    ),
    # FHIR R4 Procedure.subject cardinality 1..1.
    (
        "procedure-no-subject",
        _with(PROCEDURE, subject=None),
        (
            "Procedure: google-fhir-r4 structural check: "
            "Required field `Procedure.subject` is missing",
        ),
    ),
    # FHIR R4 Observation invariant obs-6: dataAbsentReason only without value[x].
    (
        "observation-value-and-data-absent-reason",
        _with(OBSERVATION, dataAbsentReason={"text": "not measured"}),
        ("Observation: invariant obs-6 failed: dataAbsentReason.empty() or value.empty()",),
    ),
    # FHIR R4 Observation invariant obs-7: no value when a component has the Observation's code.
    (
        "observation-component-with-own-code",
        _with(
            OBSERVATION,
            component=[{"code": copy.deepcopy(OBSERVATION["code"]), "valueString": "x"}],
        ),
        ("Observation: invariant obs-7 failed",),
    ),
    # FHIR R4 Bundle invariant bdl-7: fullUrl unique within a Bundle.
    (
        "bundle-duplicate-fullurl",
        _edit(TRANSACTION, lambda b: b["entry"][1].update(fullUrl=b["entry"][0]["fullUrl"])),
        ("Bundle: invariant bdl-7 failed",),
    ),
    # FHIR R4 Bundle invariant bdl-3: entry.request mandatory in a transaction.
    (
        "transaction-entry-without-request",
        _edit(TRANSACTION, lambda b: b["entry"][1].pop("request")),
        ("Bundle: invariant bdl-3 failed",),
    ),
    # FHIR R4 JSON format: only elements defined for the type may appear.
    (
        "unknown-element",
        _with(PROCEDURE, foo="bar"),
        (
            "Procedure.foo: unknown element",
            "Procedure: google-fhir-r4 structural check: Unable to merge 'foo' into Procedure",
        ),
    ),
    # FHIR R4 4.0.1 Observation.status required binding, ValueSet observation-status.
    (
        "observation-status-done",
        _with(OBSERVATION, status="done"),
        (
            "Observation.status: 'done' not in required value set http://hl7.org/fhir/ValueSet/observation-status",
        ),
    ),
    # FHIR R4 4.0.1 MedicationRequest.intent required binding, ValueSet medicationrequest-intent.
    (
        "medication-request-intent-sometimes",
        _with(MEDICATION_REQUEST, intent="sometimes"),
        (
            "MedicationRequest.intent: 'sometimes' not in required value set "
            "http://hl7.org/fhir/ValueSet/medicationrequest-intent",
        ),
    ),
    # FHIR R4 ele-1 and JSON primitives: an empty string is not a value.
    (
        "empty-string",
        _with(PROCEDURE, note=[{"text": ""}]),
        (
            "Procedure.note[0].text: invariant ele-1 failed",
            "Procedure.note[0].text: empty string",
            "google-fhir-r4 structural check: Unable to find pattern",
        ),
    ),
    # FHIR R4 ele-1: an element needs a value or children (empty object).
    (
        "empty-object",
        _with(PROCEDURE, code={}),
        ("Procedure.code: invariant ele-1 failed",),
    ),
    # FHIR R4 Quantity invariant qty-3: a unit code needs its system.
    (
        "quantity-code-without-system",
        _edit(OBSERVATION, lambda o: o["valueQuantity"].pop("system")),
        ("Observation.valueQuantity: invariant qty-3 failed",),
    ),
    # FHIR R4 Period invariant per-1: start not after end.
    (
        "period-reversed",
        _with(PROCEDURE, performedPeriod={"start": "2024-05-02", "end": "2024-05-01"}),
        ("Procedure.performedPeriod: invariant per-1 failed",),
    ),
    # FHIR R4 Extension invariant ext-1: extension or value[x], not neither.
    (
        "extension-without-value",
        _with(PROCEDURE, extension=[{"url": "http://example.org/fhir/ext"}]),
        ("Procedure.extension[0]: invariant ext-1 failed",),
    ),
    # FHIR R4 Reference invariant ref-1: a '#' reference needs that contained resource.
    (
        "local-reference-without-contained",
        _with(PROCEDURE, recorder={"reference": "#nobody"}),
        ("Procedure.recorder: invariant ref-1 failed",),
    ),
    # FHIR R4 DomainResource invariant dom-3: a contained resource must be referenced.
    (
        "contained-unreferenced",
        _with(PROCEDURE, contained=[{"resourceType": "Practitioner", "id": "surgeon"}]),
        ("Procedure: invariant dom-3 failed",),
    ),
    # FHIR R4 DomainResource invariant dom-2: no nested contained resources.
    (
        "contained-nested",
        _with(
            PROCEDURE,
            contained=[
                {
                    "resourceType": "Practitioner",
                    "id": "surgeon",
                    "contained": [{"resourceType": "Organization", "id": "org", "name": "x"}],
                }
            ],
            performer=[{"actor": {"reference": "#surgeon"}}],
        ),
        ("Procedure: invariant dom-2 failed",),
    ),
    # FHIR R4 Observation.value[x] 0..1: only one member of a choice element
    # (google-fhir-r4 0.11 silently keeps the last one).
    (
        "two-choice-values",
        _with(OBSERVATION, valueString="15 mmHg"),
        ("Observation: more than one value for Observation.value[x]: valueQuantity, valueString",),
    ),
    # FHIR R4 JSON format: a 0..1 element is not an array.
    (
        "array-for-single",
        _with(PROCEDURE, subject=[{"reference": "Patient/example"}]),
        ("Procedure.subject: must not be an array",),
    ),
    # FHIR R4 JSON format: a 0..* element is always an array.
    (
        "single-for-array",
        _with(PROCEDURE, note={"text": "x"}),
        ("Procedure.note: must be a JSON array",),
    ),
    # FHIR R4 dateTime: with a time, a time zone SHALL be given (dateTime regex).
    (
        "datetime-without-zone",
        _with(PROCEDURE, performedDateTime="2024-05-01T09:30:00"),
        ("Procedure.performedDateTime: '2024-05-01T09:30:00' does not match the dateTime format",),
    ),
    # FHIR R4 boolean: a JSON true/false, not a string.
    (
        "boolean-as-string",
        _with(
            PROCEDURE, extension=[{"url": "http://example.org/fhir/ext", "valueBoolean": "true"}]
        ),
        ("Procedure.extension[0].valueBoolean: 'true' is not a valid JSON value for FHIR boolean",),
    ),
    # FHIR R4 Procedure.subject: Reference(Patient | Group) only.
    (
        "subject-wrong-target-type",
        _with(PROCEDURE, subject={"reference": "Device/laser"}),
        ("invalid reference type: `Device`",),
    ),
    # FHIR R4 Narrative.div: one XHTML div (narrative.html), here not even XML.
    (
        "narrative-not-xhtml",
        _with(PROCEDURE, text={"status": "generated", "div": "YAG capsulotomy"}),
        ("Procedure.text.div: invariant txt-1/txt-2",),
    ),
    # FHIR R4 Narrative.div txt-2: some non-whitespace content.
    (
        "narrative-empty",
        _with(
            PROCEDURE,
            text={
                "status": "generated",
                "div": '<div xmlns="http://www.w3.org/1999/xhtml"> </div>',
            },
        ),
        ("Procedure.text.div: invariant txt-1/txt-2", "no non-whitespace content"),
    ),
    # FHIR R4 Narrative.div txt-1: no scripts.
    (
        "narrative-script",
        _with(
            PROCEDURE,
            text={
                "status": "generated",
                "div": '<div xmlns="http://www.w3.org/1999/xhtml">x<script>alert(1)</script></div>',
            },
        ),
        (
            "Procedure.text.div: invariant txt-1",
            "element <script> is not allowed",
        ),
    ),
    # FHIR R4 Narrative.div txt-1: only whitelisted attributes (no event handlers).
    (
        "narrative-onclick",
        _with(
            PROCEDURE,
            text={
                "status": "generated",
                "div": '<div xmlns="http://www.w3.org/1999/xhtml"><p onclick="x()">x</p></div>',
            },
        ),
        ("Procedure.text.div: invariant txt-1", "attribute onclick on <p> is not allowed"),
    ),
    # FHIR R4 Narrative.status required binding, ValueSet narrative-status (a data type's binding).
    (
        "narrative-status-auto",
        _with(PROCEDURE, text={"status": "auto", "div": XHTML_DIV}),
        (
            "Procedure.text.status: 'auto' not in required value set http://hl7.org/fhir/ValueSet/narrative-status",
        ),
    ),
    # FHIR R4 Bundle.entry.request.method required binding, ValueSet http-verb.
    (
        "bundle-request-method",
        _edit(TRANSACTION, lambda b: b["entry"][0]["request"].update(method="PUSH")),
        (
            "Bundle.entry[0].request.method: 'PUSH' not in required value set "
            "http://hl7.org/fhir/ValueSet/http-verb",
        ),
    ),
    # FHIR R4 Bundle: resources inside entries are checked too, and named by position.
    (
        "bundle-bad-entry-resource",
        _transaction(PROCEDURE, _with(OBSERVATION, status="done")),
        (
            "Bundle.entry[1].resource: Observation.status: 'done' not in required value set",
            "Bundle.entry[1].resource: Observation: google-fhir-r4 structural check",
        ),
    ),
    # FHIR R4 Observation.status 1..1, inside DomainResource.contained (google-fhir-r4
    # skips contained resources unless they are parsed on their own).
    (
        "contained-resource-missing-status",
        _with(
            PROCEDURE,
            contained=[{"resourceType": "Observation", "id": "iop", "code": {"text": "IOP"}}],
            reasonReference=[{"reference": "#iop"}],
        ),
        (
            "Procedure.contained[0]: Observation: google-fhir-r4 structural check: "
            "Required field `Observation.status` is missing",
        ),
    ),
    # FHIR R4 Resource: resourceType must name an R4 resource.
    (
        "unknown-resource-type",
        {"resourceType": "Capsulotomy", "status": "completed"},
        ("unknown resourceType 'Capsulotomy'",),
    ),
]


@pytest.mark.parametrize(
    ("name", "resource", "expected"), REJECTED, ids=[name for name, _, _ in REJECTED]
)
def test_rejects_invalid_resources(
    name: str, resource: Resource, expected: tuple[str, ...]
) -> None:
    problems = r4_problems(resource)
    for fragment in expected:
        assert any(fragment in problem for problem in problems), (fragment, problems)
    # A rejection must come from a real finding, never from the checker failing.
    assert not [p for p in problems if "could not be evaluated" in p], problems


def test_problems_in_two_bundle_entries_are_both_reported() -> None:
    # google-fhir-r4 stops at the first error; each entry resource is parsed alone.
    bundle = _transaction(
        _with(PROCEDURE, subject=None), _with(SERVICE_REQUEST, intent="sometimes")
    )
    problems = r4_problems(bundle)
    assert any(
        p.startswith("Bundle.entry[0].resource: Procedure: google-fhir-r4") for p in problems
    )
    assert any(
        p.startswith("Bundle.entry[1].resource: ServiceRequest: google-fhir-r4") for p in problems
    )
    assert any(
        p.startswith("Bundle.entry[1].resource: ServiceRequest.intent: 'sometimes'")
        for p in problems
    )


def test_does_not_modify_its_argument() -> None:
    bundle = copy.deepcopy(TRANSACTION)
    before = json.dumps(bundle, sort_keys=True)
    r4_problems(bundle)
    assert json.dumps(bundle, sort_keys=True) == before


# --- the value-set layer against the package ----------------------------------

EVENT_STATUS = "http://hl7.org/fhir/ValueSet/event-status"


def test_event_status_expansion_is_exactly_the_r4_codes() -> None:
    # FHIR R4 4.0.1 ValueSet event-status (CodeSystem http://hl7.org/fhir/event-status).
    assert {code for _, code in _expand(EVENT_STATUS)} == {
        "preparation", "in-progress", "not-done", "on-hold",
        "stopped", "completed", "entered-in-error", "unknown",
    }  # fmt: skip


@settings(max_examples=40, deadline=None, database=None)
@given(st.sampled_from(sorted(code for _, code in _expand(EVENT_STATUS))))
def test_every_event_status_code_is_accepted(code: str) -> None:
    assert r4_problems(_with(PROCEDURE, status=code)) == []


@settings(max_examples=40, deadline=None, database=None)
@given(
    st.from_regex(r"[a-z][a-z-]{0,15}", fullmatch=True).filter(
        lambda code: code not in {c for _, c in _expand(EVENT_STATUS)}
    )
)
def test_any_other_status_code_is_rejected(code: str) -> None:
    problems = r4_problems(_with(PROCEDURE, status=code))
    assert f"Procedure.status: {code!r} not in required value set {EVENT_STATUS}" in problems


def _core_type_definitions() -> list[dict[str, Any]]:
    """Every base type / resource StructureDefinition of the R4 core package."""
    definitions = []
    for name in _package_files():
        if name.startswith("StructureDefinition-"):
            sd = _package_json(name)
            if sd and sd.get("derivation") == "specialization" and sd.get("kind") in (
                "resource", "complex-type", "primitive-type",
            ):  # fmt: skip
                definitions.append(sd)
    return definitions


def test_every_required_binding_expands_or_is_listed_as_unexpandable() -> None:
    # FHIR R4 core: all required bindings of all types.  A value set that the
    # checker cannot expand and that is not on the skip list would be reported
    # at check time; this finds it up front, and keeps the skip list honest.
    required: set[str] = set()
    for sd in _core_type_definitions():
        for element in sd["snapshot"]["element"]:
            binding = element.get("binding") or {}
            if binding.get("strength") == "required" and binding.get("valueSet"):
                required.add(binding["valueSet"].split("|", 1)[0])
    unexpandable: set[str] = set()
    for url in required:
        try:
            assert _expand(url), url
        except _UnexpandableError:
            unexpandable.add(url)
    assert unexpandable == set(_UNEXPANDABLE_VALUE_SETS)


def test_skipped_invariants_are_exactly_those_using_functions_fhirpathpy_lacks() -> None:
    # FHIR R4 core: every error-severity constraint of every type.  Each must
    # parse, and use only functions fhirpathpy has (plus hasValue, supplied by
    # the checker) unless it is on the skip list, which must not be stale.
    def functions(node: Any, found: set[str]) -> set[str]:
        if isinstance(node, dict):
            if node.get("type") == "FunctionInvocation":
                found.add(node["children"][0]["children"][0]["text"])
            for child in node.get("children") or []:
                functions(child, found)
        return found

    constraints = {
        (constraint["key"], constraint["expression"])
        for sd in _core_type_definitions()
        for element in sd["snapshot"]["element"]
        for constraint in element.get("constraint", [])
        if constraint.get("severity") == "error"
    }
    known = set(invocation_registry) | {"hasValue"}
    needing_missing_functions = {
        key
        for key, expression in constraints
        if functions(parse(expression), set()) - known  # type: ignore[no-untyped-call]
    }
    assert needing_missing_functions == set(_SKIPPED_INVARIANTS)


# --- speed ---------------------------------------------------------------------


def test_fifteen_entry_bundle_is_checked_well_under_a_second() -> None:
    resources = [
        PROCEDURE,
        OBSERVATION,
        SERVICE_REQUEST,
        MEDICATION_REQUEST,
        MEDICATION_ADMINISTRATION,
    ]
    bundle = _transaction(*(copy.deepcopy(r) for r in resources * 3))
    assert r4_problems(bundle) == []  # warm-up: package and definitions are cached
    start = time.perf_counter()
    r4_problems(bundle)
    assert time.perf_counter() - start < 1.0
