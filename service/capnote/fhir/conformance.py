"""Check one FHIR R4 JSON resource against the R4 definitions, element by element.

Everything it knows comes from the generated table (core_table, built from the official
core package): which elements exist, how many of each, their types and JSON types, the
formats of the primitives, the targets a Reference may point at and the required
bindings. It refuses what the R4B models would coerce (``"15"`` for a decimal, ``"true"``
or ``1`` for a boolean, a number for a dateTime, a 65-character id), since FHIR JSON
(R4, json.html) gives each primitive one JSON type. The core invariants are in
capnote.fhir.invariants. Every finding names the element's FHIRPath in the instance and
says, in the analyst's words (capnote.fhir.wording), what was expected and what was found.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any

from capnote.fhir import core_table, wording
from capnote.fhir.core_table import ElementRule
from capnote.fhir.wording import found as _found
from capnote.findings import Finding, Severity, error_finding

_STRUCTURE = "FHIR R4 JSON representation (json.html) and the element definitions of "
_DATES = frozenset({"date", "dateTime", "instant", "time"})
_NUMBERS = frozenset({"integer", "unsignedInt", "positiveInt", "decimal"})
_INT_RANGE = {
    "integer": (-(2**31), 2**31 - 1),
    "unsignedInt": (0, 2**31 - 1),
    "positiveInt": (1, 2**31 - 1),
}
# Values shown in findings: codes, ids and machine-made values, never free text or dates
# (which may be a patient's).
_SHOWN = frozenset({"code", "id", "boolean", "integer", "unsignedInt", "positiveInt", "decimal"})
_QUANTITIES = frozenset(
    {"Quantity", "Age", "Count", "Distance", "Duration", "MoneyQuantity", "SimpleQuantity"}
)
# FHIR R4 references.html: a relative literal reference is [Type]/[id], optionally
# /_history/[vid], under an optional absolute service base.
_LITERAL = re.compile(
    r"^(?:(?P<base>https?://[^\s?#]+/))?(?P<type>[A-Z][A-Za-z]+)/(?P<id>[A-Za-z0-9\-.]{1,64})"
    r"(?:/_history/[A-Za-z0-9\-.]{1,64})?$"
)
_CONDITIONAL = re.compile(r"^(?P<type>[A-Z][A-Za-z]+)\?\S+$")
_UUID = re.compile(r"^urn:uuid:[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}$")
_OID = re.compile(r"^urn:oid:[0-2](\.(0|[1-9][0-9]*))+$")
# Real resources nest a few levels (a Questionnaire's items perhaps twenty); a hostile one
# could nest until the walk's recursion ran out, which must be a finding, not a 500.
MAX_DEPTH = 64
_SCHEME = re.compile(r"^[A-Za-z][A-Za-z0-9+.\-]*:")


def problem(
    code: str,
    location: str,
    message: str,
    rule: str,
    issue_type: str,
    value: str | None = None,
    allowed: str | None = None,
) -> Finding:
    """An error finding at location."""
    return error_finding(
        code, location, message, rule, value=value, allowed=allowed, issue_type=issue_type
    )


@dataclass
class Node:
    """A complex element met during the walk, for the invariants to look at."""

    type_name: str  # the data type (Quantity, Reference) or the resource type for backbones
    path: str  # its path in the definitions: "Observation.referenceRange"
    location: str  # its FHIRPath in the instance: "Observation.referenceRange[0]"
    data: dict[str, Any]


@dataclass
class ResourceScope:
    """One resource in the walk: itself, its container (for contained ones), what it holds."""

    data: dict[str, Any]
    location: str
    root: dict[str, Any]  # %rootResource: the container of a contained resource, else itself
    contained: bool
    nodes: list[Node] = field(default_factory=list)
    container: ResourceScope | None = None
    narratives: list[tuple[str, str]] = field(default_factory=list)  # (location, div)
    references: list[tuple[str, str]] = field(default_factory=list)  # (location, reference)

    def note_reference(self, location: str, reference: str) -> None:
        """Keep a reference here and in the container (dom-3 reads %resource.descendants())."""
        self.references.append((location, reference))
        if self.container is not None:
            self.container.references.append((location, reference))


class Walker:
    """Walks a resource; fills findings and, per resource, the nodes the invariants need."""

    def __init__(self) -> None:
        self.findings: list[Finding] = []
        self.scopes: list[ResourceScope] = []
        # urn:uuid / absolute fullUrls of a Bundle's entries -> their resource type
        self.full_urls: dict[str, str] = {}
        self._depth = 0
        self._too_deep = False

    def add(self, finding: Finding) -> None:
        """Record a finding."""
        self.findings.append(finding)

    # -- resources ---------------------------------------------------------------------

    def resource(
        self,
        data: Any,
        location: str,
        container: ResourceScope | None = None,
    ) -> None:
        """Check one resource found at location (its type's name at the top)."""
        if not isinstance(data, dict):
            self.add(
                problem(
                    "fhir-json-type",
                    location,
                    f"{location or 'the body'}: expected a resource (an object), found "
                    f"{_found(data)}",
                    _STRUCTURE + "Resource",
                    "structure",
                )
            )
            return
        kind = data.get("resourceType")
        if not isinstance(kind, str):
            self.add(
                problem(
                    "fhir-no-resource-type",
                    _join(location, "resourceType"),
                    f"{_join(location, 'resourceType')}: expected the name of a resource "
                    f"type, found {'none' if kind is None else _found(kind)}",
                    "FHIR R4 JSON representation (json.html#resources)",
                    "structure",
                )
            )
            return
        if not core_table.is_resource_type(kind):
            self.add(
                problem(
                    "fhir-unknown-type",
                    _join(location, "resourceType"),
                    f"{_join(location, 'resourceType')}: expected a FHIR R4 resource type, "
                    f"found {kind[:64]!r}, which is not one",
                    f"resourceType names a resource of {core_table.package()}",
                    "not-supported",
                    value=kind[:64],
                )
            )
            return
        here = location or kind
        root_data = container.data if container is not None else data
        scope = ResourceScope(
            data, here, root_data, contained=container is not None, container=container
        )
        self.scopes.append(scope)
        self._object(data, kind, kind, here, scope, resource_root=True)
        resource_id = data.get("id")
        if isinstance(resource_id, str):
            self._id_format(resource_id, _join(here, "id"))

    def _id_format(self, value: str, location: str) -> None:
        # R4 (resource.html#id) types Resource.id as id; the 4.0.1 snapshots list the
        # element as a plain string, so the id format is applied here by name.
        regex = core_table.primitive_regex("id")
        if regex is not None and not regex.fullmatch(value):
            self.add(
                problem(
                    "fhir-format",
                    location,
                    f"{location}: expected {wording.expected('id')}, found {_id_fault(value)}",
                    f"FHIR R4 datatypes.html#id: an id is {wording.forms('id')}",
                    "value",
                    value=value[:70],
                    allowed=wording.forms("id"),
                )
            )

    # -- objects -----------------------------------------------------------------------

    def _object(
        self,
        data: dict[str, Any],
        type_name: str,
        path: str,
        location: str,
        scope: ResourceScope,
        resource_root: bool = False,
        node_type: str | None = None,
    ) -> None:
        if self._depth >= MAX_DEPTH:
            if not self._too_deep:
                self._too_deep = True
                self.add(
                    problem(
                        "fhir-too-deep",
                        location,
                        f"{location}: expected at most {MAX_DEPTH} levels of nested "
                        "elements, found more (not checked below)",
                        f"capnote checks FHIR elements up to {MAX_DEPTH} levels deep",
                        "too-costly",
                        allowed=f"<= {MAX_DEPTH} levels",
                    )
                )
            return
        self._depth += 1
        try:
            self._children(data, type_name, path, location, scope, resource_root)
            # The invariants see the node as its profile's type where one applies.
            scope.nodes.append(Node(node_type or type_name, path, location, data))
        finally:
            self._depth -= 1

    def _children(
        self,
        data: dict[str, Any],
        type_name: str,
        path: str,
        location: str,
        scope: ResourceScope,
        resource_root: bool,
    ) -> None:
        rules = core_table.children(type_name, path)
        choices = core_table.choice_names(type_name, path)
        seen: dict[str, list[str]] = {}
        for key in data:
            if key == "resourceType" and resource_root:
                continue
            name = key[1:] if key.startswith("_") else key
            if key.startswith("_") and name in data:
                continue  # checked with its value
            rule, code = self._rule_for(name, rules, choices)
            if rule is None:
                self.add(
                    problem(
                        "fhir-unknown-element",
                        _join(location, key),
                        f"{_join(location, key)}: expected an element of {path}, found "
                        f"{key[:64]!r}, which is not one",
                        _STRUCTURE + type_name,
                        "structure",
                        value=key[:64],
                    )
                )
                continue
            seen.setdefault(rule.path, []).append(name)
            value = data.get(name)
            part = data.get("_" + name)
            self._property(rule, code, name, value, part, type_name, location, scope)
        for rule in rules.values():
            found = seen.get(rule.path, [])
            if rule.choice and len(found) > 1:
                self.add(
                    problem(
                        "fhir-choice",
                        _join(location, found[1]),
                        f"{_join(location, rule.name)}[x]: expected one type at a time, found "
                        + " and ".join(found),
                        _STRUCTURE + type_name,
                        "structure",
                    )
                )
            if rule.min > 0 and not found:
                label = rule.name + ("[x]" if rule.choice else "")
                self.add(
                    problem(
                        "fhir-required",
                        _join(location, label),
                        f"{_join(location, label)}: expected a value ({rule.path} is "
                        "required), found none",
                        _STRUCTURE + type_name,
                        "required",
                    )
                )

    @staticmethod
    def _rule_for(
        name: str, rules: dict[str, ElementRule], choices: dict[str, tuple[ElementRule, str]]
    ) -> tuple[ElementRule | None, str]:
        rule = rules.get(name)
        if rule is not None and not rule.choice:
            return rule, rule.types[0] if rule.types else ""
        choice = choices.get(name)
        if choice is not None:
            return choice
        return None, ""

    def _property(
        self,
        rule: ElementRule,
        code: str,
        name: str,
        value: Any,
        part: Any,
        type_name: str,
        location: str,
        scope: ResourceScope,
    ) -> None:
        where = _join(location, name)
        if part is not None and not core_table.is_primitive(code):
            self.add(
                problem(
                    "fhir-unknown-element",
                    _join(location, "_" + name),
                    f"{_join(location, '_' + name)}: expected no '_' partner (only a "
                    f"primitive element has one), found one for {code}",
                    "FHIR R4 json.html#primitive",
                    "structure",
                )
            )
            part = None
            if value is None:
                return
        present = value if value is not None else part
        if present is None:
            self.add(
                problem(
                    "fhir-json-type",
                    where,
                    f"{where}: expected a value, found null (leave the element out)",
                    "FHIR R4 json.html: null only stands in arrays with a '_' partner",
                    "structure",
                )
            )
            return
        if rule.many:
            if not isinstance(present, list) or (
                value is not None and part is not None and not isinstance(part, list)
            ):
                self.add(
                    problem(
                        "fhir-cardinality",
                        where,
                        f"{where}: expected a list, found "
                        f"{_found(part if isinstance(present, list) else present)} "
                        f"({rule.path} repeats, so it is a JSON array"
                        + (f", and so is '_{name}')" if isinstance(present, list) else ")"),
                        _STRUCTURE + type_name,
                        "structure",
                    )
                )
                return
            values = value if isinstance(value, list) else [None] * len(present)
            parts = part if isinstance(part, list) else [None] * len(values)
            if not values:
                self.add(
                    problem(
                        "fhir-invariant",
                        where,
                        f"{where}: expected a list of one or more, found an empty list "
                        "(leave the element out)",
                        "ele-1: " + core_table.invariant("ele-1")[0],
                        "invariant",
                    )
                )
                return
            if len(parts) != len(values):
                self.add(
                    problem(
                        "fhir-structure",
                        where,
                        f"{where}: expected '_{name}' as long as '{name}' ({len(values)} "
                        f"items), found {len(parts)}",
                        "FHIR R4 json.html#primitive",
                        "structure",
                    )
                )
                return
            for i, (item, item_part) in enumerate(zip(values, parts, strict=True)):
                self._item(rule, code, item, item_part, f"{where}[{i}]", type_name, scope)
            return
        if isinstance(present, list) or isinstance(part, list):
            self.add(
                problem(
                    "fhir-cardinality",
                    where,
                    f"{where}: expected one value, found a list ({rule.path} occurs at most once)",
                    _STRUCTURE + type_name,
                    "structure",
                )
            )
            return
        self._item(rule, code, value, part, where, type_name, scope)

    def _item(
        self,
        rule: ElementRule,
        code: str,
        value: Any,
        part: Any,
        where: str,
        type_name: str,
        scope: ResourceScope,
    ) -> None:
        if core_table.is_primitive(code):
            if value is None and part is None:
                self.add(
                    problem(
                        "fhir-json-type",
                        where,
                        f"{where}: expected a value, found null without a '_' partner",
                        "FHIR R4 json.html#primitive",
                        "structure",
                    )
                )
                return
            if value is not None:
                self._primitive(code, value, where, rule, scope)
            if part is not None:
                if isinstance(part, dict):
                    self._object(part, "Element", "Element", where, scope)
                else:
                    self.add(
                        problem(
                            "fhir-json-type",
                            where,
                            f"{where}: expected an object as the '_' partner, found {_found(part)}",
                            "FHIR R4 json.html#primitive",
                            "structure",
                        )
                    )
            return
        if not isinstance(value, dict):
            self.add(
                problem(
                    "fhir-json-type",
                    where,
                    f"{where}: expected "
                    + ("a resource (an object)" if code == "Resource" else f"a {code} object")
                    + f", found {_found(value)}",
                    _STRUCTURE + code,
                    "structure",
                )
            )
            return
        if code == "Resource":
            contained = rule.path.endswith(".contained")
            self.resource(value, where, scope if contained else None)
            return
        if rule.content_reference:
            self._object(value, type_name, rule.content_reference, where, scope)
        elif code in ("BackboneElement", "Element") and core_table.children(type_name, rule.path):
            self._object(value, type_name, rule.path, where, scope)
        elif code == "SimpleQuantity":
            # Quantity's elements; the node keeps the profile's name for sqty-1.
            self._object(value, "Quantity", "Quantity", where, scope, node_type=code)
        elif core_table.is_type(code):
            self._object(value, code, code, where, scope)
            if code == "Reference":
                self._reference(value, rule, where, scope)
        else:
            self.add(
                problem(
                    "fhir-structure",
                    where,
                    f"{where}: expected a type defined in R4, found {code}",
                    core_table.package(),
                    "structure",
                )
            )
            return
        self._binding(rule, code, value, where)

    # -- primitives --------------------------------------------------------------------

    def _primitive(
        self, code: str, value: Any, where: str, rule: ElementRule, scope: ResourceScope
    ) -> None:
        shown = _show(code, value)
        expected = wording.expected(code)
        seen = _found(value)
        # Why a value that looks right is refused: "6.3" or "true" in quotes, 2026 without.
        quoted = isinstance(value, str)
        hint = ""
        if code == "boolean":
            ok = isinstance(value, bool)
            wanted = "a JSON boolean (true or false)"
            if quoted:
                hint = " (FHIR JSON writes boolean as a JSON boolean, without quotes)"
        elif code in _NUMBERS:
            ok = isinstance(value, int | float) and not isinstance(value, bool)
            wanted = "a JSON number"
            if quoted:
                hint = f" (FHIR JSON writes {code} as a JSON number, without quotes)"
            if ok and code in _INT_RANGE:
                low, high = _INT_RANGE[code]
                ok = isinstance(value, int) and low <= value <= high
                wanted = f"a JSON whole number from {low} to {high}"
                expected = f"a whole number from {low} to {high}"
                seen = repr(value)[:40]  # a number, never free text
                hint = ""
        else:
            ok = isinstance(value, str)
            wanted = "a JSON string"
            if code not in ("string", "markdown"):
                expected += " as a string"
                hint = f" (FHIR JSON writes {code} as a JSON string, in quotes)"
        if not ok:
            self.add(
                problem(
                    "fhir-json-type",
                    where,
                    f"{where}: expected {expected}, found {seen}{hint}",
                    f"FHIR R4 json.html#primitive: {code} is {wanted}",
                    "value",
                    value=shown,
                    allowed=wanted,
                )
            )
            return
        if isinstance(value, str):
            if code in ("canonical", "uri", "url") and value.startswith("#"):
                scope.note_reference(where, value)  # dom-3 counts these as references
            self._string(code, value, where, shown, scope)
            if rule.value_set is not None:
                self._code(rule, value, where)

    def _string(
        self, code: str, value: str, where: str, shown: str | None, scope: ResourceScope
    ) -> None:
        if value == "":
            self.add(
                problem(
                    "fhir-format",
                    where,
                    f"{where}: expected a value, found an empty string (leave the element out)",
                    "FHIR R4 json.html: strings are never empty",
                    "value",
                )
            )
            return
        if code == "xhtml":
            scope.narratives.append((where, value))  # txt-1 and txt-2, with the invariants
            return
        regex = core_table.primitive_regex(code)
        ok = regex is None or regex.fullmatch(value) is not None
        if ok and code in ("date", "dateTime", "instant"):
            ok = _exists(value)
        if not ok:
            forms = wording.forms(code)
            if shown is not None:
                seen = f"{shown!r}"
            else:  # free text or a date, which may be a patient's: what is wrong, not what
                fault = wording.date_fault(code, value) if code in _DATES else None
                seen = "a string" + (f" in which {fault}" if fault else " in another form")
            self.add(
                problem(
                    "fhir-format",
                    where,
                    f"{where}: expected {wording.expected(code)}, found {seen}",
                    f"FHIR R4 datatypes.html#{code}"
                    + (f": a {code} is {forms}" if forms is not None else ""),
                    "value",
                    value=shown,
                    allowed=forms,
                )
            )

    # -- codes -------------------------------------------------------------------------

    def _code(self, rule: ElementRule, value: str, where: str) -> None:
        url = rule.value_set
        assert url is not None
        codes = core_table.value_set_codes(url)
        if codes is None or value in codes:
            return
        self.add(_not_in(where, value, url))

    def _binding(self, rule: ElementRule, code: str, value: dict[str, Any], where: str) -> None:
        url = rule.value_set
        if url is None or code not in ("Coding", "CodeableConcept"):
            return
        members = core_table.value_set(url)
        if members is None:
            return
        codings = [value] if code == "Coding" else value.get("coding") or []
        pairs = [(c.get("system"), c.get("code")) for c in codings if isinstance(c, dict)]
        if any(pair in members for pair in pairs):
            return
        seen = ", ".join(f"{s}#{c}" for s, c in pairs) or "no coding"
        self.add(_not_in(where, seen, url))

    # -- references --------------------------------------------------------------------

    def _reference(
        self, value: dict[str, Any], rule: ElementRule, where: str, scope: ResourceScope
    ) -> None:
        reference = value.get("reference")
        if not isinstance(reference, str) or not reference:
            return
        scope.note_reference(_join(where, "reference"), reference)
        kind = self._target_type(reference, _join(where, "reference"), scope)
        targets = rule.targets.get("Reference", ())
        if kind is None or not targets or "Resource" in targets or kind in targets:
            return
        self.add(
            problem(
                "fhir-reference-target",
                _join(where, "reference"),
                f"{_join(where, 'reference')}: expected a reference to "
                + " or ".join(targets)
                + f" ({rule.path}), found a reference to a {kind}",
                f"targetProfile of {rule.path} in {core_table.package()}",
                "invalid",
                value=kind,
                allowed=", ".join(targets),
            )
        )

    def _target_type(self, reference: str, where: str, scope: ResourceScope) -> str | None:
        """The type a reference points at when the reference says (None when it cannot
        say); a malformed reference is a finding."""
        if reference.startswith("#"):
            wanted = reference[1:]
            for item in scope.root.get("contained") or []:
                if isinstance(item, dict) and item.get("id") == wanted:
                    kind = item.get("resourceType")
                    return kind if isinstance(kind, str) else None
            return None  # ref-1 reports a local reference with nothing contained
        if reference.startswith("urn:uuid:") or reference.startswith("urn:oid:"):
            pattern = _UUID if reference.startswith("urn:uuid:") else _OID
            if not pattern.match(reference):
                self._malformed(reference, where, "urn:uuid:<uuid> or urn:oid:<oid>")
                return None
            return self.full_urls.get(reference)
        literal = _LITERAL.match(reference)
        if literal is not None and core_table.is_resource_type(literal["type"]):
            return literal["type"]
        conditional = _CONDITIONAL.match(reference)
        if conditional is not None and core_table.is_resource_type(conditional["type"]):
            return conditional["type"]  # a conditional reference (transactions)
        if _SCHEME.match(reference) and not reference.startswith(("urn:uuid:", "urn:oid:")):
            # An absolute URL need not be a FHIR server's (references.html#literal).
            return self.full_urls.get(reference)
        self._malformed(reference, where, "[Type]/[id], an absolute URL, urn:uuid:, or #id")
        return None

    def _malformed(self, reference: str, where: str, allowed: str) -> None:
        self.add(
            problem(
                "fhir-reference-malformed",
                where,
                f"{where}: expected a literal reference ({allowed}), found a string in "
                "another form",
                "FHIR R4 references.html#literal: a relative reference is [Type]/[id] with "
                "a resource type of R4 and an id of 1 to 64 characters",
                "value",
                allowed=allowed,
            )
        )


def _not_in(where: str, seen: str, url: str) -> Finding:
    return Finding(
        severity=Severity.ERROR,
        code="fhir-code-not-in-value-set",
        location=where,
        message=f"{where}: expected a code of the required value set {url}, found {seen[:120]!r}",
        rule=f"required binding to {url} ({core_table.package()})",
        value=seen[:120],
        issue_type="code-invalid",
    )


def _exists(value: str) -> bool:
    """The calendar date in a date, dateTime or instant exists (no 30 February)."""
    if len(value) < 10:
        return True  # a year or a year and month
    try:
        date.fromisoformat(value[:10])
    except ValueError:
        return False
    if "T" in value and len(value) > 10:
        try:
            datetime.fromisoformat(value.replace("Z", "+00:00").replace(":60", ":59"))
        except ValueError:
            return False
    return True


def _show(code: str, value: Any) -> str | None:
    if code not in _SHOWN:
        return None if isinstance(value, str) else _json_type(value)
    text = repr(value) if not isinstance(value, str) else value
    return text[:70]


def _id_fault(value: str) -> str:
    """What is wrong with an id, shown (ids are machine-made, R4 resource.html#id)."""
    if not value:
        return "an empty string"
    if len(value) > 64:
        return f"{len(value)} characters"
    bad = next((c for c in value if not (c.isascii() and (c.isalnum() or c in "-."))), "")
    name = {" ": "a space", "\t": "a tab", "\n": "a line break"}.get(bad, repr(bad))
    return f"{value[:70]!r}, which holds {name}"


def _json_type(value: Any) -> str:
    if isinstance(value, bool):
        return f"the JSON boolean {str(value).lower()}"
    if isinstance(value, int | float):
        return "a JSON number"
    if isinstance(value, str):
        return "a JSON string"
    if isinstance(value, list):
        return "a JSON array"
    if value is None:
        return "null"
    return "a JSON object"


def _join(location: str, name: str) -> str:
    return f"{location}.{name}" if location else name


def walk(data: Any) -> Walker:
    """Walk a resource (a Bundle's entries, contained and parameter resources too)."""
    walker = Walker()
    if isinstance(data, dict) and data.get("resourceType") == "Bundle":
        for entry in _entries(data):
            url, resource = entry.get("fullUrl"), entry.get("resource")
            if isinstance(url, str) and isinstance(resource, dict):
                kind = resource.get("resourceType")
                if isinstance(kind, str):
                    walker.full_urls[url] = kind
    walker.resource(data, "")
    return walker


def _entries(bundle: dict[str, Any]) -> Iterator[dict[str, Any]]:
    entries = bundle.get("entry")
    if isinstance(entries, list):
        yield from (e for e in entries if isinstance(e, dict))
