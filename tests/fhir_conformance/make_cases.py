"""Build the conformance cases (cases.json) from the FHIR R4 specification's own examples.

The valid resources are the specification's published R4 (4.0.1) examples in examples/
(their names are the specification's file names), and Bundles that wrap them as the
Bundle rules describe. Every invalid resource is one of them with one mechanical change
that breaks one rule of the specification, named beside it with the section that states
it; valid variants (a change the rules allow) are there too, so that a validator that
rejects everything cannot score. Each case is stored as a base and a JSON Patch (RFC 6902
subset: add, replace, remove), so the file shows exactly what changed.

    python -m tests.fhir_conformance.make_cases     # rewrite tests/fhir_conformance/cases.json
"""

from __future__ import annotations

import copy
import json
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

HERE = Path(__file__).parent
EXAMPLES = HERE / "examples"
CASES = HERE / "cases.json"

Patch = list[dict[str, Any]]
JSON = "FHIR R4 json.html"
TYPES = "FHIR R4 datatypes.html"
REFS = "FHIR R4 references.html"

# The subject (Reference to a Patient) and a dateTime element of each example's type.
SUBJECT = "/subject"
DATE_TIME = {
    "Observation": None,  # effective[x] differs per example, found below
    "Procedure": None,
    "ServiceRequest": "/authoredOn",
    "MedicationRequest": "/authoredOn",
    "MedicationAdministration": "/effectivePeriod/start",
}


def examples() -> dict[str, dict[str, Any]]:
    """The specification's examples, by file name."""
    return {p.name: json.loads(p.read_text("utf-8")) for p in sorted(EXAMPLES.glob("*.json"))}


def _pointer_get(data: Any, pointer: str) -> Any:
    for part in pointer.split("/")[1:]:
        data = data[int(part)] if isinstance(data, list) else data[part]
    return data


def apply(base: Any, patch: Patch) -> Any:
    """The base with the patch applied (add, replace and remove of RFC 6902)."""
    out = copy.deepcopy(base)
    for op in patch:
        *parents, last = op["path"].split("/")[1:]
        target = out
        for part in parents:
            target = target[int(part)] if isinstance(target, list) else target[part]
        if op["op"] == "remove":
            del target[int(last) if isinstance(target, list) else last]
        elif isinstance(target, list):
            if last == "-":
                target.append(copy.deepcopy(op["value"]))
            elif op["op"] == "add":
                target.insert(int(last), copy.deepcopy(op["value"]))
            else:
                target[int(last)] = copy.deepcopy(op["value"])
        else:
            target[last] = copy.deepcopy(op["value"])
    return out


def _date_time(resource: dict[str, Any]) -> str | None:
    kind = resource["resourceType"]
    fixed = DATE_TIME.get(kind)
    if fixed:
        return fixed
    for key in ("effectiveDateTime", "performedDateTime"):
        if key in resource:
            return "/" + key
    for key in ("effectivePeriod", "performedPeriod"):
        if key in resource:
            return f"/{key}/start"
    return None


def _quantity(resource: Any, path: str = "") -> str | None:
    """The JSON pointer of the first Quantity with a value and a coded unit."""
    if isinstance(resource, dict):
        if "value" in resource and "code" in resource and "system" in resource:
            return path
        for key, value in resource.items():
            if key in ("contained", "text"):
                continue
            found = _quantity(value, f"{path}/{key}")
            if found is not None:
                return found
    elif isinstance(resource, list):
        for i, value in enumerate(resource):
            found = _quantity(value, f"{path}/{i}")
            if found is not None:
                return found
    return None


def _fhirpath(kind: str, pointer: str) -> str:
    """A JSON pointer as the FHIRPath a validator names: /a/0/b -> Kind.a[0].b."""
    out = kind
    for part in pointer.split("/")[1:]:
        out += f"[{part}]" if part.isdigit() else f".{part}"
    return out


Case = tuple[str, str, str, Patch, str]  # (name, rule, source, patch, location pointer)


def resource_cases(resource: dict[str, Any]) -> Iterator[tuple[Case, bool]]:
    """(case, valid) pairs for one example resource."""

    def bad(name: str, rule: str, source: str, patch: Patch, where: str) -> tuple[Case, bool]:
        return (name, rule, source, patch, where), False

    def good(name: str, rule: str, source: str, patch: Patch) -> tuple[Case, bool]:
        return (name, rule, source, patch, ""), True

    # Resource id (datatypes.html#id: [A-Za-z0-9\-\.]{1,64}; resource.html#id: Resource.id is id)
    yield bad(
        "id-65-chars",
        "id is at most 64 characters",
        TYPES + "#id",
        [{"op": "replace", "path": "/id", "value": "a" * 65}],
        "/id",
    )
    yield bad(
        "id-underscore",
        "id has only A-Z a-z 0-9 - .",
        TYPES + "#id",
        [{"op": "replace", "path": "/id", "value": "ex_ample"}],
        "/id",
    )
    yield good(
        "id-64-chars",
        "id is at most 64 characters",
        TYPES + "#id",
        [{"op": "replace", "path": "/id", "value": "a" * 64}],
    )
    yield bad(
        "meta-lastUpdated-number",
        "instant is a JSON string",
        JSON + "#primitive",
        [{"op": "add", "path": "/meta", "value": {"lastUpdated": 20160328}}],
        "/meta/lastUpdated",
    )
    yield bad(
        "meta-versionId-number",
        "id is a JSON string",
        JSON + "#primitive",
        [{"op": "add", "path": "/meta", "value": {"versionId": 1}}],
        "/meta/versionId",
    )
    yield good(
        "meta-lastUpdated",
        "instant with a time zone",
        TYPES + "#instant",
        [{"op": "add", "path": "/meta", "value": {"lastUpdated": "2016-03-28T10:00:00Z"}}],
    )
    yield bad(
        "unknown-element",
        "no element outside the definition",
        JSON + " (unknown elements are errors)",
        [{"op": "add", "path": "/recordedBy", "value": "x"}],
        "/recordedBy",
    )
    yield bad(
        "implicitRules-number",
        "uri is a JSON string",
        JSON + "#primitive",
        [{"op": "add", "path": "/implicitRules", "value": 1}],
        "/implicitRules",
    )
    yield bad(
        "empty-string",
        "strings are never empty",
        JSON + "#primitive",
        [{"op": "add", "path": "/implicitRules", "value": ""}],
        "/implicitRules",
    )
    yield bad(
        "null-value",
        "null is no value",
        JSON + "#primitive",
        [{"op": "add", "path": "/language", "value": None}],
        "/language",
    )
    # Status: required binding, and 1..1
    yield bad(
        "status-not-in-value-set",
        "status is bound (required)",
        "FHIR R4 terminologies.html#required",
        [{"op": "replace", "path": "/status", "value": "done"}],
        "/status",
    )
    yield bad(
        "status-missing",
        "status is 1..1",
        "the resource's definition (status 1..1)",
        [{"op": "remove", "path": "/status"}],
        "/status",
    )
    yield bad(
        "status-array",
        "a 0..1 element is not an array",
        JSON + "#arrays",
        [{"op": "replace", "path": "/status", "value": [resource["status"]]}],
        "/status",
    )
    # The narrative
    yield bad(
        "text-status",
        "Narrative.status is bound (required)",
        TYPES + " narrative-status",
        [{"op": "replace", "path": "/text/status", "value": "done"}],
        "/text/status",
    )
    yield bad(
        "text-script",
        "txt-1: basic XHTML only",
        "FHIR R4 narrative.html#xhtml (txt-1)",
        [
            {
                "op": "replace",
                "path": "/text/div",
                "value": '<div xmlns="http://www.w3.org/1999/xhtml"><script>alert(1)</script>x</div>',
            }
        ],
        "/text/div",
    )
    yield bad(
        "text-onclick",
        "txt-1: no event attributes",
        "FHIR R4 narrative.html#xhtml (txt-1)",
        [
            {
                "op": "replace",
                "path": "/text/div",
                "value": '<div xmlns="http://www.w3.org/1999/xhtml"><p onclick="x()">x</p></div>',
            }
        ],
        "/text/div",
    )
    yield bad(
        "text-no-namespace",
        "the div is in the XHTML namespace",
        "FHIR R4 narrative.html#xhtml",
        [{"op": "replace", "path": "/text/div", "value": "<div>Biopsy</div>"}],
        "/text/div",
    )
    yield bad(
        "text-empty-div",
        "txt-2: some non-whitespace content",
        "FHIR R4 narrative.html (txt-2)",
        [
            {
                "op": "replace",
                "path": "/text/div",
                "value": '<div xmlns="http://www.w3.org/1999/xhtml"> </div>',
            }
        ],
        "/text/div",
    )
    yield bad(
        "text-no-div",
        "Narrative.div is 1..1",
        TYPES + "#Narrative",
        [{"op": "remove", "path": "/text/div"}],
        "/text/div",
    )
    yield good(
        "text-nbsp",
        "XHTML entities are allowed",
        "FHIR R4 narrative.html#xhtml",
        [
            {
                "op": "replace",
                "path": "/text/div",
                "value": '<div xmlns="http://www.w3.org/1999/xhtml"><p>a&nbsp;b</p></div>',
            }
        ],
    )
    # References (references.html): target types, form, contained (ref-1, dom-*)
    yield bad(
        "subject-practitioner",
        "subject's targets exclude Practitioner",
        REFS + " and the targetProfile of subject",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "Practitioner/example"}}],
        SUBJECT,
    )
    yield bad(
        "subject-space",
        "a relative reference is [Type]/[id]",
        REFS + "#literal",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "Patient 123"}}],
        SUBJECT,
    )
    yield bad(
        "subject-lowercase-type",
        "a relative reference names a resource type",
        REFS + "#literal",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "patient/123"}}],
        SUBJECT,
    )
    yield bad(
        "subject-no-id",
        "a relative reference has an id",
        REFS + "#literal",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "Patient/"}}],
        SUBJECT,
    )
    yield bad(
        "subject-bad-uuid",
        "urn:uuid: holds a UUID",
        REFS + " and " + TYPES + "#uuid",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "urn:uuid:123"}}],
        SUBJECT,
    )
    yield bad(
        "subject-string",
        "a Reference is a JSON object",
        JSON + "#complex",
        [{"op": "replace", "path": SUBJECT, "value": "Patient/example"}],
        SUBJECT,
    )
    yield good(
        "subject-absolute",
        "an absolute reference",
        REFS + "#literal",
        [
            {
                "op": "replace",
                "path": SUBJECT,
                "value": {"reference": "http://example.org/fhir/Patient/123"},
            }
        ],
    )
    yield good(
        "subject-versioned",
        "a version-specific reference",
        REFS + "#literal",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "Patient/123/_history/2"}}],
    )
    yield good(
        "subject-uuid",
        "a urn:uuid reference",
        REFS + "#literal",
        [
            {
                "op": "replace",
                "path": SUBJECT,
                "value": {"reference": "urn:uuid:61ebe359-bfdc-4613-8bf2-c5e300945f0a"},
            }
        ],
    )
    yield good(
        "subject-identifier",
        "a logical reference",
        REFS + "#logical",
        [
            {
                "op": "replace",
                "path": SUBJECT,
                "value": {"identifier": {"system": "http://example.org/mrn", "value": "12345"}},
            }
        ],
    )
    yield bad(
        "subject-local-missing",
        "ref-1: a local reference needs the contained resource",
        REFS + "#contained (ref-1)",
        [{"op": "replace", "path": SUBJECT, "value": {"reference": "#nobody"}}],
        SUBJECT,
    )
    contained = list(resource.get("contained", []))
    with_patient = [*contained, {"resourceType": "Patient", "id": "c1", "active": True}]
    yield good(
        "subject-contained",
        "a contained, referenced resource",
        REFS + "#contained",
        [
            {"op": "add", "path": "/contained", "value": with_patient},
            {"op": "replace", "path": SUBJECT, "value": {"reference": "#c1"}},
        ],
    )
    yield bad(
        "contained-unreferenced",
        "dom-3: a contained resource is referenced",
        REFS + "#contained (dom-3)",
        [{"op": "add", "path": "/contained", "value": with_patient}],
        f"/contained/{len(contained)}",
    )
    nested = [
        *contained,
        {
            "resourceType": "Patient",
            "id": "c1",
            "contained": [{"resourceType": "Patient", "id": "c2"}],
            "link": [{"other": {"reference": "#c2"}, "type": "seealso"}],
        },
    ]
    yield bad(
        "contained-nested",
        "dom-2: no contained inside contained",
        REFS + "#contained (dom-2)",
        [
            {"op": "add", "path": "/contained", "value": nested},
            {"op": "replace", "path": SUBJECT, "value": {"reference": "#c1"}},
        ],
        f"/contained/{len(contained)}",
    )
    versioned = [
        *contained,
        {"resourceType": "Patient", "id": "c1", "meta": {"versionId": "2"}, "active": True},
    ]
    yield bad(
        "contained-versioned",
        "dom-4: a contained resource has no meta.versionId",
        REFS + "#contained (dom-4)",
        [
            {"op": "add", "path": "/contained", "value": versioned},
            {"op": "replace", "path": SUBJECT, "value": {"reference": "#c1"}},
        ],
        f"/contained/{len(contained)}",
    )
    labelled = [
        *contained,
        {
            "resourceType": "Patient",
            "id": "c1",
            "active": True,
            "meta": {
                "security": [
                    {
                        "system": "http://terminology.hl7.org/CodeSystem/v3-Confidentiality",
                        "code": "R",
                    }
                ]
            },
        },
    ]
    yield bad(
        "contained-security",
        "dom-5: a contained resource has no security label",
        REFS + "#contained (dom-5)",
        [
            {"op": "add", "path": "/contained", "value": labelled},
            {"op": "replace", "path": SUBJECT, "value": {"reference": "#c1"}},
        ],
        f"/contained/{len(contained)}",
    )
    # Extensions (extensibility.html: ext-1, url 1..1)
    yield good(
        "extension",
        "an extension with url and value",
        "FHIR R4 extensibility.html",
        [
            {
                "op": "add",
                "path": "/extension",
                "value": [
                    {"url": "http://example.org/fhir/StructureDefinition/x", "valueString": "y"}
                ],
            }
        ],
    )
    yield bad(
        "extension-both",
        "ext-1: extension or value, not both",
        "FHIR R4 extensibility.html (ext-1)",
        [
            {
                "op": "add",
                "path": "/extension",
                "value": [
                    {
                        "url": "http://example.org/x",
                        "valueString": "y",
                        "extension": [{"url": "z", "valueBoolean": True}],
                    }
                ],
            }
        ],
        "/extension/0",
    )
    yield bad(
        "extension-no-url",
        "Extension.url is 1..1",
        "FHIR R4 extensibility.html",
        [{"op": "add", "path": "/extension", "value": [{"valueString": "y"}]}],
        "/extension/0",
    )
    yield bad(
        "extension-object",
        "extension repeats, so it is an array",
        JSON + "#arrays",
        [
            {
                "op": "add",
                "path": "/extension",
                "value": {"url": "http://example.org/x", "valueString": "y"},
            }
        ],
        "/extension",
    )
    yield bad(
        "extension-empty-array",
        "arrays are never empty",
        JSON + "#arrays",
        [{"op": "add", "path": "/extension", "value": []}],
        "/extension",
    )
    # Identifier.use (required identifier-use)
    yield bad(
        "identifier-use",
        "Identifier.use is bound (required)",
        TYPES + "#Identifier",
        [{"op": "add", "path": "/identifier", "value": [{"use": "primary", "value": "1"}]}],
        "/identifier/0/use",
    )
    yield good(
        "identifier-use-usual",
        "Identifier.use usual",
        TYPES + "#Identifier",
        [{"op": "add", "path": "/identifier", "value": [{"use": "usual", "value": "1"}]}],
    )
    yield bad(
        "identifier-object",
        "identifier repeats, so it is an array",
        JSON + "#arrays",
        [{"op": "add", "path": "/identifier", "value": {"value": "1"}}],
        "/identifier",
    )
    yield bad(
        "identifier-empty-object",
        "ele-1: an element has a value or children",
        "FHIR R4 element.html (ele-1)",
        [{"op": "add", "path": "/identifier", "value": [{}]}],
        "/identifier/0",
    )
    yield bad(
        "identifier-period",
        "per-1: start before end",
        TYPES + "#Period (per-1)",
        [
            {
                "op": "add",
                "path": "/identifier",
                "value": [{"value": "1", "period": {"start": "2015-02-01", "end": "2015-01-01"}}],
            }
        ],
        "/identifier/0/period",
    )
    # dateTime
    where = _date_time(resource)
    if where is not None:
        yield bad(
            "dateTime-number",
            "dateTime is a JSON string",
            JSON + "#primitive",
            [{"op": "replace", "path": where, "value": 20130128}],
            where,
        )
        yield bad(
            "dateTime-30-february",
            "dateTime is a date that exists",
            TYPES + "#dateTime",
            [{"op": "replace", "path": where, "value": "2013-02-30"}],
            where,
        )
        yield bad(
            "dateTime-slashes",
            "dateTime is YYYY-MM-DD...",
            TYPES + "#dateTime",
            [{"op": "replace", "path": where, "value": "2013/01/28"}],
            where,
        )
        yield bad(
            "dateTime-no-zone",
            "a dateTime with a time has a time zone",
            TYPES + "#dateTime",
            [{"op": "replace", "path": where, "value": "2013-01-28T13:31:00"}],
            where,
        )
        yield good(
            "dateTime-year",
            "a dateTime may be a year",
            TYPES + "#dateTime",
            [{"op": "replace", "path": where, "value": "2010"}],
        )
        yield good(
            "dateTime-leap-second",
            "seconds may be 60 (a leap second)",
            TYPES + "#dateTime",
            [{"op": "replace", "path": where, "value": "2008-12-31T23:59:60Z"}],
        )
    # Quantity
    quantity = _quantity(resource)
    if quantity is not None:
        yield bad(
            "decimal-string",
            "decimal is a JSON number",
            JSON + "#primitive",
            [{"op": "replace", "path": quantity + "/value", "value": "15"}],
            quantity + "/value",
        )
        yield bad(
            "decimal-boolean",
            "decimal is a JSON number",
            JSON + "#primitive",
            [{"op": "replace", "path": quantity + "/value", "value": True}],
            quantity + "/value",
        )
        yield bad(
            "comparator",
            "Quantity.comparator is bound (required)",
            TYPES + "#Quantity",
            [{"op": "add", "path": quantity + "/comparator", "value": "~"}],
            quantity + "/comparator",
        )
        simple = "/doseAndRate/" in quantity  # Dosage.doseAndRate.doseQuantity is a SimpleQuantity
        comparator = [{"op": "add", "path": quantity + "/comparator", "value": "<"}]
        if simple:
            yield bad(
                "sqty-1",
                "sqty-1: a SimpleQuantity has no comparator",
                TYPES + "#SimpleQuantity (sqty-1)",
                comparator,
                quantity + "/comparator",
            )
        else:
            yield good("comparator-less", "Quantity.comparator <", TYPES + "#Quantity", comparator)
        yield bad(
            "qty-3",
            "qty-3: a unit code needs its system",
            TYPES + "#Quantity (qty-3)",
            [{"op": "remove", "path": quantity + "/system"}],
            quantity,
        )
        yield good(
            "decimal-exponent-free",
            "a decimal with a fraction",
            JSON + "#primitive",
            [{"op": "replace", "path": quantity + "/value", "value": 15.25}],
        )
    yield from _specific(resource, bad, good)


def _specific(
    resource: dict[str, Any],
    bad: Callable[..., tuple[Case, bool]],
    good: Callable[..., tuple[Case, bool]],
) -> Iterator[tuple[Case, bool]]:
    kind = resource["resourceType"]
    obs = "FHIR R4 observation.html"
    if kind == "Observation":
        value = next((k for k in resource if k.startswith("value")), None)
        if value is not None:
            yield bad(
                "obs-6",
                "obs-6: dataAbsentReason only without a value",
                obs + " (obs-6)",
                [{"op": "add", "path": "/dataAbsentReason", "value": {"text": "not asked"}}],
                "",
            )
            yield bad(
                "value-two-types",
                "one type of value[x] at a time",
                JSON + "#choice",
                [{"op": "add", "path": "/valueString", "value": "x"}],
                "/valueString",
            )
            yield bad(
                "obs-7",
                "obs-7: no component with the Observation's own code when it has a value",
                obs + " (obs-7)",
                [
                    {
                        "op": "add",
                        "path": "/component",
                        "value": [{"code": resource["code"], "valueString": "x"}],
                    }
                ],
                "/component/0/code",
            )
        yield bad(
            "code-missing",
            "Observation.code is 1..1",
            obs,
            [{"op": "remove", "path": "/code"}],
            "/code",
        )
        yield bad(
            "code-array",
            "Observation.code is 0..1 in JSON form",
            JSON + "#arrays",
            [{"op": "replace", "path": "/code", "value": [resource["code"]]}],
            "/code",
        )
        yield bad(
            "value-boolean-string",
            "boolean is a JSON boolean",
            JSON + "#primitive",
            [
                {
                    "op": "add",
                    "path": "/component",
                    "value": [{"code": {"text": "flag"}, "valueBoolean": "true"}],
                }
            ],
            "/component/0/valueBoolean",
        )
        yield bad(
            "value-boolean-number",
            "boolean is a JSON boolean",
            JSON + "#primitive",
            [
                {
                    "op": "add",
                    "path": "/component",
                    "value": [{"code": {"text": "flag"}, "valueBoolean": 1}],
                }
            ],
            "/component/0/valueBoolean",
        )
        yield bad(
            "value-integer-string",
            "integer is a JSON number",
            JSON + "#primitive",
            [
                {
                    "op": "add",
                    "path": "/component",
                    "value": [{"code": {"text": "count"}, "valueInteger": "15"}],
                }
            ],
            "/component/0/valueInteger",
        )
        yield bad(
            "value-integer-fraction",
            "integer is a whole number",
            TYPES + "#integer",
            [
                {
                    "op": "add",
                    "path": "/component",
                    "value": [{"code": {"text": "count"}, "valueInteger": 1.5}],
                }
            ],
            "/component/0/valueInteger",
        )
        yield good(
            "value-boolean",
            "a boolean component",
            obs,
            [
                {
                    "op": "add",
                    "path": "/component",
                    "value": [{"code": {"text": "flag"}, "valueBoolean": True}],
                }
            ],
        )
        yield bad(
            "obs-3",
            "obs-3: a reference range has low, high or text",
            obs + " (obs-3)",
            [
                {
                    "op": "add",
                    "path": "/referenceRange",
                    "value": [{"appliesTo": [{"text": "adults"}]}],
                }
            ],
            "/referenceRange/0",
        )
        yield bad(
            "subject-medication",
            "Observation.subject's targets exclude Medication",
            REFS,
            [{"op": "replace", "path": "/subject", "value": {"reference": "Medication/m1"}}],
            "/subject",
        )
        yield good(
            "subject-group",
            "Observation.subject may be a Group",
            REFS,
            [{"op": "replace", "path": "/subject", "value": {"reference": "Group/g1"}}],
        )
        yield bad(
            "performer-device",
            "Observation.performer's targets exclude Device",
            REFS,
            [{"op": "add", "path": "/performer", "value": [{"reference": "Device/d1"}]}],
            "/performer/0",
        )
    if kind == "Procedure":
        yield bad(
            "performed-two-types",
            "one type of performed[x] at a time",
            JSON + "#choice",
            [{"op": "add", "path": "/performedString", "value": "yesterday"}],
            "/performedString",
        )
        yield bad(
            "subject-missing",
            "Procedure.subject is 1..1",
            "FHIR R4 procedure.html",
            [{"op": "remove", "path": "/subject"}],
            "/subject",
        )
        yield bad(
            "period-reversed",
            "per-1: start before end",
            TYPES + "#Period (per-1)",
            [
                {
                    "op": "replace",
                    "path": "/performedPeriod",
                    "value": {
                        "start": "2013-01-28T14:27:00+01:00",
                        "end": "2013-01-28T13:31:00+01:00",
                    },
                }
            ],
            "/performedPeriod",
        )
        yield bad(
            "performer-actor-missing",
            "Procedure.performer.actor is 1..1",
            "FHIR R4 procedure.html",
            [{"op": "replace", "path": "/performer/0", "value": {"function": {"text": "surgeon"}}}],
            "/performer/0/actor",
        )
        yield bad(
            "encounter-observation",
            "Procedure.encounter refers to an Encounter",
            REFS,
            [{"op": "replace", "path": "/encounter", "value": {"reference": "Observation/o1"}}],
            "/encounter",
        )
        yield good(
            "performer-organization",
            "a performer may be an Organization",
            REFS,
            [
                {
                    "op": "replace",
                    "path": "/performer/0/actor",
                    "value": {"reference": "Organization/f001"},
                }
            ],
        )
    if kind == "ServiceRequest":
        yield bad(
            "priority",
            "ServiceRequest.priority is bound (required)",
            "FHIR R4 servicerequest.html",
            [{"op": "add", "path": "/priority", "value": "soon"}],
            "/priority",
        )
        yield good(
            "priority-urgent",
            "ServiceRequest.priority urgent",
            "FHIR R4 servicerequest.html",
            [{"op": "add", "path": "/priority", "value": "urgent"}],
        )
        yield bad(
            "intent",
            "ServiceRequest.intent is bound (required)",
            "FHIR R4 servicerequest.html",
            [{"op": "replace", "path": "/intent", "value": "ordered"}],
            "/intent",
        )
        yield bad(
            "intent-missing",
            "ServiceRequest.intent is 1..1",
            "FHIR R4 servicerequest.html",
            [{"op": "remove", "path": "/intent"}],
            "/intent",
        )
        yield bad(
            "doNotPerform-string",
            "boolean is a JSON boolean",
            JSON + "#primitive",
            [{"op": "add", "path": "/doNotPerform", "value": "false"}],
            "/doNotPerform",
        )
        yield bad(
            "timing-frequency-string",
            "positiveInt is a JSON number",
            JSON + "#primitive",
            [{"op": "replace", "path": "/occurrenceTiming/repeat/frequency", "value": "1"}],
            "/occurrenceTiming/repeat/frequency",
        )
        yield bad(
            "timing-frequency-zero",
            "positiveInt is 1 or more",
            TYPES + "#positiveInt",
            [{"op": "replace", "path": "/occurrenceTiming/repeat/frequency", "value": 0}],
            "/occurrenceTiming/repeat/frequency",
        )
        yield bad(
            "timing-period-unit",
            "Timing.repeat.periodUnit is bound (required)",
            TYPES + "#Timing",
            [{"op": "replace", "path": "/occurrenceTiming/repeat/periodUnit", "value": "day"}],
            "/occurrenceTiming/repeat/periodUnit",
        )
        yield bad(
            "requester-device-patient-ok-location-not",
            "ServiceRequest.requester's targets exclude Location",
            REFS,
            [{"op": "replace", "path": "/requester", "value": {"reference": "Location/l1"}}],
            "/requester",
        )
    if kind == "MedicationRequest":
        yield bad(
            "intent",
            "MedicationRequest.intent is bound (required)",
            "FHIR R4 medicationrequest.html",
            [{"op": "replace", "path": "/intent", "value": "directive"}],
            "/intent",
        )
        yield bad(
            "priority",
            "MedicationRequest.priority is bound (required)",
            "FHIR R4 medicationrequest.html",
            [{"op": "add", "path": "/priority", "value": "soon"}],
            "/priority",
        )
        yield bad(
            "substitution-boolean-string",
            "boolean is a JSON boolean",
            JSON + "#primitive",
            [{"op": "replace", "path": "/substitution/allowedBoolean", "value": "true"}],
            "/substitution/allowedBoolean",
        )
        yield bad(
            "repeats-string",
            "unsignedInt is a JSON number",
            JSON + "#primitive",
            [{"op": "replace", "path": "/dispenseRequest/numberOfRepeatsAllowed", "value": "1"}],
            "/dispenseRequest/numberOfRepeatsAllowed",
        )
        yield bad(
            "repeats-negative",
            "unsignedInt is 0 or more",
            TYPES + "#unsignedInt",
            [{"op": "replace", "path": "/dispenseRequest/numberOfRepeatsAllowed", "value": -1}],
            "/dispenseRequest/numberOfRepeatsAllowed",
        )
        yield bad(
            "period-unit",
            "Timing.repeat.periodUnit is bound (required)",
            TYPES + "#Timing",
            [
                {
                    "op": "replace",
                    "path": "/dosageInstruction/0/timing/repeat/periodUnit",
                    "value": "day",
                }
            ],
            "/dosageInstruction/0/timing/repeat/periodUnit",
        )
        yield bad(
            "medication-contained-observation",
            "medicationReference refers to a Medication",
            REFS,
            [
                {
                    "op": "replace",
                    "path": "/contained/0",
                    "value": {
                        "resourceType": "Observation",
                        "id": "med0320",
                        "status": "final",
                        "code": {"text": "x"},
                    },
                }
            ],
            "/medicationReference",
        )
        yield bad(
            "sequence-string",
            "integer is a JSON number",
            JSON + "#primitive",
            [{"op": "replace", "path": "/dosageInstruction/0/sequence", "value": "1"}],
            "/dosageInstruction/0/sequence",
        )
    if kind == "MedicationAdministration":
        yield bad(
            "effective-missing",
            "MedicationAdministration.effective[x] is 1..1",
            "FHIR R4 medicationadministration.html",
            [{"op": "remove", "path": "/effectivePeriod"}],
            "/effective",
        )
        yield bad(
            "period-reversed",
            "per-1: start before end",
            TYPES + "#Period (per-1)",
            [
                {
                    "op": "replace",
                    "path": "/effectivePeriod/end",
                    "value": "2015-01-14T14:30:00+01:00",
                }
            ],
            "/effectivePeriod",
        )
        yield bad(
            "medication-missing",
            "medication[x] is 1..1",
            "FHIR R4 medicationadministration.html",
            [{"op": "remove", "path": "/medicationReference"}],
            "/medication",
        )
        yield bad(
            "request-observation",
            "MedicationAdministration.request refers to a MedicationRequest",
            REFS,
            [{"op": "replace", "path": "/request", "value": {"reference": "Observation/o1"}}],
            "/request",
        )
        yield good(
            "effective-dateTime",
            "effectiveDateTime instead of a Period",
            "FHIR R4 medicationadministration.html",
            [
                {"op": "remove", "path": "/effectivePeriod"},
                {"op": "add", "path": "/effectiveDateTime", "value": "2015-01-15T14:30:00+01:00"},
            ],
        )


def bundles(resources: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """Bundles of the examples, built as the Bundle rules say each type is (bundle.html)."""
    entries = [
        {"fullUrl": f"http://example.org/fhir/{r['resourceType']}/{r['id']}", "resource": r}
        for r in resources.values()
    ]
    collection = {
        "resourceType": "Bundle",
        "id": "examples",
        "type": "collection",
        "entry": entries,
    }
    transaction = {
        "resourceType": "Bundle",
        "id": "examples-transaction",
        "type": "transaction",
        "entry": [
            {
                **e,
                "request": {
                    "method": "PUT",
                    "url": f"{e['resource']['resourceType']}/{e['resource']['id']}",
                },
            }
            for e in entries
        ],
    }
    searchset = {
        "resourceType": "Bundle",
        "id": "examples-search",
        "type": "searchset",
        "total": len(entries),
        "entry": [{**e, "search": {"mode": "match"}} for e in entries],
    }
    composition = {
        "resourceType": "Composition",
        "id": "summary",
        "status": "final",
        "type": {"text": "Summary of the examples"},
        "date": "2017-02-01",
        "author": [{"reference": "Practitioner/example"}],
        "title": "Summary",
    }
    document = {
        "resourceType": "Bundle",
        "id": "examples-document",
        "identifier": {
            "system": "urn:ietf:rfc:3986",
            "value": "urn:uuid:0c3151bd-1cbf-4d64-b04d-cd9187a4c6e0",
        },
        "type": "document",
        "timestamp": "2017-02-01T17:23:07Z",
        "entry": [
            {"fullUrl": "http://example.org/fhir/Composition/summary", "resource": composition},
            *entries,
        ],
    }
    return {
        "bundle:collection": collection,
        "bundle:transaction": transaction,
        "bundle:searchset": searchset,
        "bundle:document": document,
    }


def bundle_cases() -> Iterator[tuple[str, Case, bool]]:
    b = "FHIR R4 bundle.html"

    def case(
        base: str, name: str, rule: str, patch: Patch, where: str, valid: bool
    ) -> tuple[str, Case, bool]:
        return base, (name, rule, b, patch, where), valid

    for base in ("bundle:collection", "bundle:transaction", "bundle:searchset", "bundle:document"):
        yield case(base, "as-built", "the Bundle as its type requires", [], "", True)
        yield case(
            base,
            "type-not-in-value-set",
            "Bundle.type is bound (required)",
            [{"op": "replace", "path": "/type", "value": "bundle"}],
            "/type",
            False,
        )
        yield case(
            base,
            "duplicate-fullUrl",
            "bdl-7: fullUrl unique",
            [
                {
                    "op": "replace",
                    "path": "/entry/1/fullUrl",
                    "value": "http://example.org/fhir/dup/1",
                },
                {
                    "op": "replace",
                    "path": "/entry/2/fullUrl",
                    "value": "http://example.org/fhir/dup/1",
                },
            ],
            "/entry/2/fullUrl",
            False,
        )
        yield case(
            base,
            "fullUrl-history",
            "bdl-8: fullUrl is not version specific",
            [
                {
                    "op": "replace",
                    "path": "/entry/1/fullUrl",
                    "value": "http://example.org/fhir/Procedure/f001/_history/1",
                }
            ],
            "/entry/1/fullUrl",
            False,
        )
        yield case(
            base,
            "entry-empty-resource",
            "bdl-5: an entry has a resource, request or response",
            [{"op": "remove", "path": "/entry/1/resource"}]
            + (
                [{"op": "remove", "path": "/entry/1/request"}]
                if base == "bundle:transaction"
                else []
            ),
            "/entry/1",
            False,
        )
        yield case(
            base,
            "entry-response",
            "bdl-4: entry.response only in responses and history",
            [{"op": "add", "path": "/entry/1/response", "value": {"status": "201 Created"}}],
            "/entry/1",
            False,
        )
        yield case(
            base,
            "entry-resource-string",
            "Bundle.entry.resource is a resource (a JSON object)",
            [{"op": "replace", "path": "/entry/1/resource", "value": "Procedure/f001"}],
            "/entry/1/resource",
            False,
        )
        yield case(
            base,
            "entry-resource-unknown-type",
            "resourceType names an R4 resource",
            [{"op": "replace", "path": "/entry/1/resource/resourceType", "value": "Prescription"}],
            "/entry/1/resource/resourceType",
            False,
        )
        yield case(
            base,
            "entry-resource-status",
            "an entry's resource is checked as a resource",
            [{"op": "replace", "path": "/entry/1/resource/status", "value": "done"}],
            "/entry/1/resource/status",
            False,
        )
        yield case(
            base,
            "timestamp-number",
            "instant is a JSON string",
            [{"op": "add", "path": "/timestamp", "value": 1485969787}],
            "/timestamp",
            False,
        )
        yield case(
            base,
            "link",
            "a Bundle link",
            [
                {
                    "op": "add",
                    "path": "/link",
                    "value": [{"relation": "self", "url": "http://example.org/fhir/Bundle/x"}],
                }
            ],
            "",
            True,
        )
    yield case(
        "bundle:collection",
        "total",
        "bdl-1: total only in a searchset or history",
        [{"op": "add", "path": "/total", "value": 8}],
        "/total",
        False,
    )
    yield case(
        "bundle:collection",
        "search",
        "bdl-2: entry.search only in a searchset",
        [{"op": "add", "path": "/entry/0/search", "value": {"mode": "match"}}],
        "/entry/0/search",
        False,
    )
    yield case(
        "bundle:collection",
        "request",
        "bdl-3: entry.request only in a batch, transaction or history",
        [
            {
                "op": "add",
                "path": "/entry/0/request",
                "value": {"method": "POST", "url": "Observation"},
            }
        ],
        "/entry/0",
        False,
    )
    yield case(
        "bundle:transaction",
        "request-missing",
        "bdl-3: every transaction entry has a request",
        [{"op": "remove", "path": "/entry/0/request"}],
        "/entry/0",
        False,
    )
    yield case(
        "bundle:transaction",
        "request-method",
        "Bundle.entry.request.method is bound (required)",
        [{"op": "replace", "path": "/entry/0/request/method", "value": "FETCH"}],
        "/entry/0/request/method",
        False,
    )
    yield case(
        "bundle:transaction",
        "request-url-missing",
        "Bundle.entry.request.url is 1..1",
        [{"op": "remove", "path": "/entry/0/request/url"}],
        "/entry/0/request/url",
        False,
    )
    yield case(
        "bundle:transaction",
        "conditional",
        "a conditional create",
        [
            {
                "op": "replace",
                "path": "/entry/0/request",
                "value": {
                    "method": "POST",
                    "url": "MedicationAdministration",
                    "ifNoneExist": "identifier=x|1",
                },
            }
        ],
        "",
        True,
    )
    yield case(
        "bundle:searchset",
        "search-mode",
        "Bundle.entry.search.mode is bound (required)",
        [{"op": "replace", "path": "/entry/0/search/mode", "value": "hit"}],
        "/entry/0/search/mode",
        False,
    )
    yield case(
        "bundle:searchset",
        "search-score-string",
        "decimal is a JSON number",
        [{"op": "add", "path": "/entry/0/search/score", "value": "0.5"}],
        "/entry/0/search/score",
        False,
    )
    yield case(
        "bundle:searchset",
        "total-string",
        "unsignedInt is a JSON number",
        [{"op": "replace", "path": "/total", "value": "8"}],
        "/total",
        False,
    )
    yield case(
        "bundle:searchset",
        "include",
        "search.mode include",
        [{"op": "replace", "path": "/entry/0/search/mode", "value": "include"}],
        "",
        True,
    )
    yield case(
        "bundle:document",
        "identifier-missing",
        "bdl-9: a document has an identifier",
        [{"op": "remove", "path": "/identifier"}],
        "/identifier",
        False,
    )
    yield case(
        "bundle:document",
        "identifier-no-system",
        "bdl-9: the identifier has a system",
        [{"op": "remove", "path": "/identifier/system"}],
        "/identifier",
        False,
    )


def build() -> list[dict[str, Any]]:
    """Every case: id, base, rule, source, verdict, the FHIRPath expected, the patch."""
    resources = examples()
    out: list[dict[str, Any]] = []
    for name, resource in resources.items():
        kind = resource["resourceType"]
        out.append(
            {
                "id": f"{name}:as-published",
                "base": name,
                "rule": "the specification's own example",
                "source": "FHIR R4 (4.0.1) example " + name,
                "verdict": "valid",
                "location": "",
                "patch": [],
            }
        )
        for (case, rule, source, patch, where), valid in resource_cases(resource):
            out.append(
                {
                    "id": f"{name}:{case}",
                    "base": name,
                    "rule": rule,
                    "source": source,
                    "verdict": "valid" if valid else "invalid",
                    "location": _fhirpath(kind, where) if where else (kind if not valid else ""),
                    "patch": patch,
                }
            )
    for base, (case, rule, source, patch, where), valid in bundle_cases():
        out.append(
            {
                "id": f"{base}:{case}",
                "base": base,
                "rule": rule,
                "source": source,
                "verdict": "valid" if valid else "invalid",
                "location": _fhirpath("Bundle", where) if where else ("" if valid else "Bundle"),
                "patch": patch,
            }
        )
    return out


def base_resource(name: str) -> dict[str, Any]:
    """A case's base: an example by file name, or one of the Bundles built from them."""
    resources = examples()
    if name in resources:
        return resources[name]
    return bundles(resources)[name]


def render(cases: list[dict[str, Any]]) -> str:
    """One case per line."""
    return "[\n" + ",\n".join(json.dumps(c, ensure_ascii=False) for c in cases) + "\n]\n"


if __name__ == "__main__":
    CASES.write_text(render(build()), encoding="utf-8")
    print(f"wrote {CASES}")
