"""Required code bindings of FHIR R4, checked before a Bundle leaves and on analysts' payloads.

fhir.resources accepts any string in a code element (Procedure.status "done" passes), so
capnote checks the required bindings of the elements it emits itself. The codes are those
of the FHIR R4 (4.0.1) value sets named beside each; a test compares this table with the
official core package.
"""

from __future__ import annotations

from typing import Any, Final

_EVENT_STATUS = frozenset(
    {
        "preparation",
        "in-progress",
        "not-done",
        "on-hold",
        "stopped",
        "completed",
        "entered-in-error",
        "unknown",
    }
)  # ValueSet event-status
_OBSERVATION_STATUS = frozenset(
    {
        "registered",
        "preliminary",
        "final",
        "amended",
        "corrected",
        "cancelled",
        "entered-in-error",
        "unknown",
    }
)  # ValueSet observation-status
_REQUEST_STATUS = frozenset(
    {"draft", "active", "on-hold", "revoked", "completed", "entered-in-error", "unknown"}
)  # ValueSet request-status
_REQUEST_INTENT = frozenset(
    {
        "proposal",
        "plan",
        "directive",
        "order",
        "original-order",
        "reflex-order",
        "filler-order",
        "instance-order",
        "option",
    }
)  # ValueSet request-intent
_MEDREQ_STATUS = frozenset(
    {
        "active",
        "on-hold",
        "cancelled",
        "completed",
        "entered-in-error",
        "stopped",
        "draft",
        "unknown",
    }
)  # ValueSet medicationrequest-status
_MEDREQ_INTENT = frozenset(
    {
        "proposal",
        "plan",
        "order",
        "original-order",
        "reflex-order",
        "filler-order",
        "instance-order",
        "option",
    }
)  # ValueSet medicationrequest-intent
_MEDADMIN_STATUS = frozenset(
    {"in-progress", "not-done", "on-hold", "completed", "entered-in-error", "stopped", "unknown"}
)  # ValueSet medication-admin-status
_BUNDLE_TYPE = frozenset(
    {
        "document",
        "message",
        "transaction",
        "transaction-response",
        "batch",
        "batch-response",
        "history",
        "searchset",
        "collection",
    }
)  # ValueSet bundle-type
_HTTP_VERB = frozenset({"GET", "HEAD", "POST", "PUT", "DELETE", "PATCH"})  # ValueSet http-verb
_NARRATIVE_STATUS = frozenset({"generated", "extensions", "additional", "empty"})
_ISSUE_SEVERITY = frozenset({"fatal", "error", "warning", "information"})
_UNITS_OF_TIME = frozenset({"s", "min", "h", "d", "wk", "mo", "a"})

# (resource type, path of the code element) -> (allowed codes, value set id)
REQUIRED: Final[dict[tuple[str, str], tuple[frozenset[str], str]]] = {
    ("Procedure", "status"): (_EVENT_STATUS, "event-status"),
    ("Observation", "status"): (_OBSERVATION_STATUS, "observation-status"),
    ("ServiceRequest", "status"): (_REQUEST_STATUS, "request-status"),
    ("ServiceRequest", "intent"): (_REQUEST_INTENT, "request-intent"),
    ("MedicationRequest", "status"): (_MEDREQ_STATUS, "medicationrequest-status"),
    ("MedicationRequest", "intent"): (_MEDREQ_INTENT, "medicationrequest-intent"),
    ("MedicationAdministration", "status"): (_MEDADMIN_STATUS, "medication-admin-status"),
    ("Bundle", "type"): (_BUNDLE_TYPE, "bundle-type"),
    ("Bundle", "entry.request.method"): (_HTTP_VERB, "http-verb"),
    ("OperationOutcome", "issue.severity"): (_ISSUE_SEVERITY, "issue-severity"),
    ("*", "text.status"): (_NARRATIVE_STATUS, "narrative-status"),
    ("MedicationRequest", "dosageInstruction.timing.repeat.periodUnit"): (
        _UNITS_OF_TIME,
        "units-of-time",
    ),
}


def _collect(
    node: Any, path: list[str], depth: int, where: str, out: list[tuple[str, Any]]
) -> None:
    """Append the values at path[depth:] below node, with their indexed FHIRPath locations.

    A plain recursive walk that fills one list: nested generators cost more than the
    lookups themselves on the request path, where every emitted resource is checked.
    """
    name = path[depth]
    if not isinstance(node, dict) or name not in node:
        return
    child = node[name]
    last = depth == len(path) - 1
    if isinstance(child, list):
        for i, item in enumerate(child):
            step = f"{where}.{name}[{i}]"
            if last:
                out.append((step, item))
            else:
                _collect(item, path, depth + 1, step, out)
    elif last:
        out.append((f"{where}.{name}", child))
    else:
        _collect(child, path, depth + 1, f"{where}.{name}", out)


# REQUIRED's rows that apply to each resource type, in REQUIRED's order, with their paths
# split: every emitted resource is checked, and sorting through all rows and splitting the
# same paths again each time cost more than the checks themselves.
_RULES: dict[Any, tuple[tuple[list[str], frozenset[str], str], ...]] = {}


def _rules(kind: Any) -> tuple[tuple[list[str], frozenset[str], str], ...]:
    # A hostile payload's resourceType may be anything, even unhashable: cache names only.
    rules = _RULES.get(kind) if isinstance(kind, str) else None
    if rules is None:
        rules = tuple(
            (path.split("."), allowed, value_set)
            for (owner, path), (allowed, value_set) in REQUIRED.items()
            if owner in (kind, "*")
        )
        if isinstance(kind, str) and len(_RULES) < 256:  # analysts may send any type name
            _RULES[kind] = rules
    return rules


def binding_problems(resource: dict[str, Any]) -> list[tuple[str, str, str]]:
    """(location, value, value set) for every code outside its required value set."""
    kind = resource.get("resourceType")
    problems: list[tuple[str, str, str]] = []
    for path, allowed, value_set in _rules(kind):
        if path[0] not in resource:  # most rows name an element this resource lacks
            continue
        if len(path) == 1:  # status, intent, type: a direct look, no walk
            value = resource[path[0]]
            if not isinstance(value, list):
                if not isinstance(value, str) or value not in allowed:
                    problems.append((f"{kind}.{path[0]}", str(value), value_set))
                continue
        found: list[tuple[str, Any]] = []
        _collect(resource, path, 0, "", found)
        for where, value in found:
            # A non-string (an object, a number) is never a code: report it, don't hash it.
            if not isinstance(value, str) or value not in allowed:
                problems.append((f"{kind}{where}", str(value), value_set))
    return problems


def status_problem(resource: dict[str, Any]) -> tuple[str, str, str] | None:
    """binding_problems for the one bound code of an emitted resource that follows the
    note's state, its status; None when it is in its value set. (The other bound codes the
    builders write are literals, checked against the core package by the tests.)"""
    kind = resource["resourceType"]
    allowed, value_set = REQUIRED[(kind, "status")]
    status = resource.get("status")
    if isinstance(status, str) and status in allowed:
        return None
    return (f"{kind}.status", str(status), value_set)
