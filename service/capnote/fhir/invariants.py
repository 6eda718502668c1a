"""The core invariants of FHIR R4 that capnote evaluates, written in Python.

Each function follows the FHIRPath expression the core package gives for its key (quoted
beside it; the table carries the package's text, and every finding cites it). The
service cannot evaluate FHIRPath itself (fhirpathpy is a test tool here), and these
expressions are short enough to follow exactly.
"""

from __future__ import annotations

import html.entities
import re
from collections.abc import Callable, Iterator
from datetime import datetime
from typing import Any
from xml.etree import ElementTree

from capnote.fhir import core_table
from capnote.fhir.conformance import Node, ResourceScope, Walker
from capnote.findings import Finding, Severity

# Resources that are no DomainResource (no text, contained, extension): dom-* do not apply.
_NOT_DOMAIN = frozenset({"Bundle", "Binary", "Parameters"})
_QUANTITIES = frozenset(
    {"Quantity", "Age", "Count", "Distance", "Duration", "MoneyQuantity", "SimpleQuantity"}
)


def _fails(key: str, location: str, detail: str = "") -> Finding:
    expression, human = core_table.invariant(key)
    return Finding(
        severity=Severity.ERROR,
        code="fhir-invariant",
        location=location,
        message=f"{location}: {key} fails: {human}" + (f" ({detail})" if detail else ""),
        rule=f"{key}: {expression} ({core_table.package()})",
        issue_type="invariant",
    )


def _has(data: dict[str, Any], name: str) -> bool:
    """FHIRPath exists() of a direct child (its value or its '_' partner)."""
    return data.get(name) not in (None, [], {}) or data.get("_" + name) not in (None, [], {})


def _has_choice(data: dict[str, Any], name: str) -> bool:
    return any(
        key.startswith(name) and key[len(name) : len(name) + 1].isupper()
        for key in data
        if data[key] not in (None, [], {})
    )


def _obj(value: Any) -> dict[str, Any]:
    return value if isinstance(value, dict) else {}


def _list(value: Any) -> list[Any]:
    return value if isinstance(value, list) else [] if value is None else [value]


# -- data types and elements -------------------------------------------------------------


def ele_1(node: Node) -> Iterator[Finding]:
    """ele-1: hasValue() or (children().count() > id.count())"""
    if node.path == node.type_name and core_table.is_resource_type(node.type_name):
        return  # a resource is no element
    if not any(key != "id" and value not in (None, [], {}) for key, value in node.data.items()):
        yield _fails("ele-1", node.location)


def ext_1(node: Node) -> Iterator[Finding]:
    """ext-1: extension.exists() != value.exists()"""
    if node.type_name == "Extension" and _has(node.data, "extension") == _has_choice(
        node.data, "value"
    ):
        yield _fails("ext-1", node.location)


def ref_1(node: Node, scope: ResourceScope) -> Iterator[Finding]:
    """ref-1: reference.startsWith('#').not() or (reference.substring(1) in
    %rootResource.contained.id)"""
    reference = node.data.get("reference")
    if node.type_name != "Reference" or not isinstance(reference, str):
        return
    if not reference.startswith("#"):
        return
    if reference == "#" and scope.contained:
        # "#" in a contained resource is its container (R4 references.html#contained); the
        # R4 expression misses this, later versions of ref-1 allow it.
        return
    ids = {c.get("id") for c in _list(scope.root.get("contained")) if isinstance(c, dict)}
    if reference[1:] not in ids:
        yield _fails("ref-1", node.location + ".reference", f"no contained {reference[1:]!r}")


def qty_3(node: Node) -> Iterator[Finding]:
    """qty-3: code.empty() or system.exists()"""
    if node.type_name in _QUANTITIES and _has(node.data, "code") and not _has(node.data, "system"):
        yield _fails("qty-3", node.location)


def sqty_1(node: Node) -> Iterator[Finding]:
    """sqty-1: comparator.empty() (SimpleQuantity)"""
    if node.type_name == "SimpleQuantity" and _has(node.data, "comparator"):
        yield _fails("sqty-1", node.location + ".comparator")


def per_1(node: Node) -> Iterator[Finding]:
    """per-1: start.hasValue().not() or end.hasValue().not() or (start <= end)"""
    if node.type_name != "Period":
        return
    start, end = node.data.get("start"), node.data.get("end")
    if not isinstance(start, str) or not isinstance(end, str):
        return
    earlier = _compare(start, end)
    if earlier is False:
        yield _fails("per-1", node.location)


def _compare(start: str, end: str) -> bool | None:
    """start <= end as FHIRPath compares dates and dateTimes: at the precision both have;
    empty (None) when they agree that far but one is more precise (FHIRPath 2.0,
    "Comparison")."""
    if len(start) > 10 and len(end) > 10:
        try:
            first = datetime.fromisoformat(start.replace("Z", "+00:00"))
            second = datetime.fromisoformat(end.replace("Z", "+00:00"))
        except ValueError:
            return None
        if (first.tzinfo is None) != (second.tzinfo is None):
            return None
        return first <= second
    # A date (YYYY, YYYY-MM, YYYY-MM-DD) against a date or a dateTime: the calendar
    # parts line up as text.
    common = min(len(start), len(end), 10)
    if start[:common] != end[:common]:
        return start[:common] < end[:common]
    return True if min(len(start), 10) == min(len(end), 10) else None


def obs_3(node: Node) -> Iterator[Finding]:
    """obs-3: low.exists() or high.exists() or text.exists()"""
    if node.type_name == "Observation" and node.path == "Observation.referenceRange":
        data = node.data
        if not (_has(data, "low") or _has(data, "high") or _has(data, "text")):
            yield _fails("obs-3", node.location)


# -- resources ---------------------------------------------------------------------------


def dom(scope: ResourceScope) -> Iterator[Finding]:
    """dom-2, dom-3, dom-4 and dom-5 on a DomainResource's contained resources."""
    data = scope.data
    if data.get("resourceType") in _NOT_DOMAIN:
        return
    referenced = {reference for _, reference in scope.references}
    for i, item in enumerate(_list(data.get("contained"))):
        if not isinstance(item, dict):
            continue
        where = f"{scope.location}.contained[{i}]"
        # dom-2: contained.contained.empty()
        if _has(item, "contained"):
            yield _fails("dom-2", where)
        meta = _obj(item.get("meta"))
        # dom-4: contained.meta.versionId.empty() and contained.meta.lastUpdated.empty()
        if _has(meta, "versionId") or _has(meta, "lastUpdated"):
            yield _fails("dom-4", where)
        # dom-5: contained.meta.security.empty()
        if _has(meta, "security"):
            yield _fails("dom-5", where)
        # dom-3: every contained resource is referred to from elsewhere in the resource
        # ('#'+id among %resource.descendants().reference and its canonical, uri and url
        # values), or refers to its container ("#").
        ident = item.get("id")
        inner = _references_inside(item)
        if not (isinstance(ident, str) and "#" + ident in referenced) and "#" not in inner:
            yield _fails("dom-3", where, f"nothing refers to #{ident}")


def _references_inside(value: Any) -> set[str]:
    """Every Reference.reference below value (iterative: a hostile resource nests deep)."""
    found: set[str] = set()
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, dict):
            for key, child in item.items():
                if key == "reference" and isinstance(child, str):
                    found.add(child)
                else:
                    stack.append(child)
        elif isinstance(item, list):
            stack.extend(item)
    return found


def observation(scope: ResourceScope) -> Iterator[Finding]:
    """obs-6 and obs-7 on an Observation."""
    data = scope.data
    if data.get("resourceType") != "Observation":
        return
    has_value = _has_choice(data, "value")
    # obs-6: dataAbsentReason.empty() or value.empty()
    if has_value and _has(data, "dataAbsentReason"):
        yield _fails("obs-6", scope.location)
    # obs-7: value.empty() or component.code.where(coding.intersect(%resource.code.coding)
    #   .exists()).empty()
    code = _obj(data.get("code"))
    codings = [c for c in _list(code.get("coding")) if isinstance(c, dict)]
    if has_value and codings:
        for i, component in enumerate(_list(data.get("component"))):
            inner = component.get("code") if isinstance(component, dict) else None
            if isinstance(inner, dict) and any(
                c in codings for c in _list(inner.get("coding")) if isinstance(c, dict)
            ):
                yield _fails("obs-7", f"{scope.location}.component[{i}].code")


_REQUEST_TYPES = ("batch", "transaction", "history")
_RESPONSE_TYPES = ("batch-response", "transaction-response", "history")


def bundle(scope: ResourceScope) -> Iterator[Finding]:
    """bdl-1 to bdl-12 (R4 has no bdl-6) on a Bundle."""
    data = scope.data
    if data.get("resourceType") != "Bundle":
        return
    kind = data.get("type")
    here = scope.location
    entries = [e if isinstance(e, dict) else {} for e in _list(data.get("entry"))]
    # bdl-1: total.empty() or (type = 'searchset') or (type = 'history')
    if _has(data, "total") and kind not in ("searchset", "history"):
        yield _fails("bdl-1", f"{here}.total")
    pairs: dict[tuple[str, str], int] = {}
    for i, entry in enumerate(entries):
        where = f"{here}.entry[{i}]"
        # bdl-2: entry.search.empty() or (type = 'searchset')
        if _has(entry, "search") and kind != "searchset":
            yield _fails("bdl-2", f"{where}.search")
        # bdl-3: entry.all(request.exists() = (%resource.type = 'batch' or ... 'history'))
        if _has(entry, "request") != (kind in _REQUEST_TYPES):
            yield _fails("bdl-3", where)
        # bdl-4: entry.all(response.exists() = (%resource.type = 'batch-response' or ...))
        if _has(entry, "response") != (kind in _RESPONSE_TYPES):
            yield _fails("bdl-4", where)
        # bdl-5: resource.exists() or request.exists() or response.exists()
        if not (_has(entry, "resource") or _has(entry, "request") or _has(entry, "response")):
            yield _fails("bdl-5", where)
        url = entry.get("fullUrl")
        if isinstance(url, str):
            # bdl-8: fullUrl.contains('/_history/').not()
            if "/_history/" in url:
                yield _fails("bdl-8", f"{where}.fullUrl")
            resource = _obj(entry.get("resource"))
            meta = _obj(resource.get("meta"))
            version = meta.get("versionId")
            pair = (url, version if isinstance(version, str) else "")
            # bdl-7: (type = 'history') or entry.where(fullUrl.exists())
            #   .select(fullUrl&resource.meta.versionId).isDistinct()
            if pair in pairs and kind != "history":
                yield _fails("bdl-7", f"{where}.fullUrl", f"as entry[{pairs[pair]}]")
            pairs.setdefault(pair, i)
    first = _obj(entries[0].get("resource")).get("resourceType") if entries else None
    if kind == "document":
        # bdl-9: type = 'document' implies (identifier.system.exists() and
        #   identifier.value.exists())
        identifier = _obj(data.get("identifier"))
        if not (_has(identifier, "system") and _has(identifier, "value")):
            yield _fails("bdl-9", f"{here}.identifier")
        # bdl-10: type = 'document' implies (timestamp.hasValue())
        if not isinstance(data.get("timestamp"), str):
            yield _fails("bdl-10", f"{here}.timestamp")
        # bdl-11: type = 'document' implies entry.first().resource.is(Composition)
        if first != "Composition":
            yield _fails("bdl-11", f"{here}.entry[0]")
    # bdl-12: type = 'message' implies entry.first().resource.is(MessageHeader)
    if kind == "message" and first != "MessageHeader":
        yield _fails("bdl-12", f"{here}.entry[0]")


# -- the narrative -----------------------------------------------------------------------

_XHTML = "{http://www.w3.org/1999/xhtml}"
_XML_LANG = "{http://www.w3.org/XML/1998/namespace}lang"
_XML_ENTITIES = frozenset({"lt", "gt", "amp", "quot", "apos"})


def narrative_problems(div: str, where: str) -> list[Finding]:
    """txt-1 and txt-2 (htmlChecks()), from the XPath form the package gives for txt-1:
    only the listed XHTML elements and attributes; some non-whitespace content or an image;
    and the xhtml type's rule that the value is one XHTML div (R4 narrative.html)."""
    # HTML's named entities (&nbsp;) are allowed in FHIR's XHTML; XML knows only five.
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
        root = ElementTree.fromstring(text)  # noqa: S314 - no entities or DTDs are expanded
    except ElementTree.ParseError as exc:
        return [_fails("txt-1", where, f"not well-formed XHTML: {exc}")]
    if root.tag != _XHTML + "div":
        return [
            _fails(
                "txt-1", where, 'the narrative is one <div xmlns="http://www.w3.org/1999/xhtml">'
            )
        ]
    elements, attributes = core_table.narrative_whitelist()
    out: list[Finding] = []
    for node in root.iter():
        tag = str(node.tag)
        local = tag.rsplit("}", 1)[-1]
        if not tag.startswith(_XHTML) or local not in elements:
            out.append(_fails("txt-1", where, f"element <{local[:40]}> is not allowed"))
        for attribute in node.attrib:
            name = "lang" if attribute == _XML_LANG else attribute
            if name not in attributes:
                out.append(_fails("txt-1", where, f"attribute {name[:40]} is not allowed"))
    image = any(n.tag == _XHTML + "img" and "src" in n.attrib for n in root.iter())
    if not "".join(root.itertext()).strip() and not image:
        out.append(_fails("txt-2", where))
    return out


_NODE_CHECKS: tuple[Callable[[Node], Iterator[Finding]], ...] = (
    ele_1,
    ext_1,
    qty_3,
    sqty_1,
    per_1,
    obs_3,
)
_RESOURCE_CHECKS: tuple[Callable[[ResourceScope], Iterator[Finding]], ...] = (
    dom,
    observation,
    bundle,
)


def evaluate(walker: Walker) -> list[Finding]:
    """Every failing invariant of every resource the walk met."""
    out: list[Finding] = []
    for scope in walker.scopes:
        for node in scope.nodes:
            for check in _NODE_CHECKS:
                out += check(node)
            out += ref_1(node, scope)
        for where, div in scope.narratives:
            out += narrative_problems(div, where)
        for resource_check in _RESOURCE_CHECKS:
            out += resource_check(scope)
    return out
