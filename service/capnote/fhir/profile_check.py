"""Check a resource against one of capnote's profiles (capnote.fhir.profiles).

The profiles are differentials on the core resources, using only what this module
evaluates: min and max, a type restriction on a choice element (and the targets of a
Reference), patternCodeableConcept, fixedCode and fixedUri, and required bindings to the
package's ValueSets (FHIR R4 profiling.html, elementdefinition.html). The core R4 checks
run first (capnote.fhir.validate); these add what the profile narrows.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from typing import Any

from capnote.fhir import wording
from capnote.fhir.profiles import expansion
from capnote.findings import Finding, Severity

_REFERENCE_TYPE = re.compile(r"(?:^|/)([A-Z][A-Za-z]+)/[A-Za-z0-9\-.]{1,64}(?:/_history/.*)?$")
_CORE = "http://hl7.org/fhir/StructureDefinition/"


def _problem(profile: str, location: str, message: str, issue_type: str = "invalid") -> Finding:
    return Finding(
        severity=Severity.ERROR,
        code="profile-constraint",
        location=location,
        message=f"{location}: {message}",
        rule=f"profile {profile}",
        issue_type=issue_type,
    )


def _step(nodes: list[tuple[str, Any]], name: str) -> list[tuple[str, str, Any]]:
    """(parent location, location, value) of every value of name below nodes."""
    out: list[tuple[str, str, Any]] = []
    for where, node in nodes:
        if not isinstance(node, dict):
            continue
        if name.endswith("[x]"):
            stem = name[:-3]
            keys = [
                k for k in node if k.startswith(stem) and k[len(stem) : len(stem) + 1].isupper()
            ]
        else:
            keys = [name] if name in node else []
        for key in keys:
            value = node[key]
            for i, item in enumerate(value if isinstance(value, list) else [value]):
                suffix = f"[{i}]" if isinstance(value, list) else ""
                out.append((where, f"{where}.{key}{suffix}", item))
    return out


def _at(resource: dict[str, Any], path: str) -> tuple[list[tuple[str, Any]], str]:
    """The parents of path's last step in the instance, and that step's name."""
    kind, *steps = path.split(".")
    nodes: list[tuple[str, Any]] = [(kind, resource)]
    for name in steps[:-1]:
        nodes = [(where, value) for _, where, value in _step(nodes, name)]
    return nodes, steps[-1] if steps else ""


def check_profile(resource: dict[str, Any], profile: dict[str, Any]) -> list[Finding]:
    """Every way the resource breaks the profile's differential."""
    url = str(profile["url"])
    out: list[Finding] = []
    for element in profile["differential"]["element"][1:]:
        out += _element(resource, element, url)
    return out


def _element(resource: dict[str, Any], element: dict[str, Any], url: str) -> Iterator[Finding]:
    path = str(element["path"])
    parents, name = _at(resource, path)
    found = _step(parents, name)
    for parent, _ in parents:
        count = sum(1 for p, _, _ in found if p == parent)
        if count < int(element.get("min", 0)):
            yield _problem(
                url,
                f"{parent}.{name}",
                f"expected at least {element['min']} (the profile's {path} min "
                f"{element['min']}), found {count or 'none'}",
                "required",
            )
        if element.get("max") == "0" and count:
            yield _problem(
                url,
                f"{parent}.{name}",
                f"expected none (the profile's {path} max 0), found {count}",
            )
    types = element.get("type")
    for _, where, value in found:
        key = where.rsplit(".", 1)[-1].split("[")[0]
        if types and name.endswith("[x]"):
            codes = [t["code"] for t in types]
            if key[len(name) - 3 :] not in [c[:1].upper() + c[1:] for c in codes]:
                allowed = " or ".join(codes)
                yield _problem(
                    url, where, f"expected {name} as {allowed} (the profile), found {key}"
                )
        for entry in types or []:
            targets = [t.removeprefix(_CORE) for t in entry.get("targetProfile", [])]
            reference = value.get("reference") if isinstance(value, dict) else None
            match = _REFERENCE_TYPE.search(reference) if isinstance(reference, str) else None
            if targets and match and match[1] not in targets:
                yield _problem(
                    url,
                    where,
                    f"expected a reference to {' or '.join(targets)} (the profile), found a "
                    f"reference to a {match[1]}",
                )
        yield from _values(element, value, where, url)


def _values(element: dict[str, Any], value: Any, where: str, url: str) -> Iterator[Finding]:
    pattern = element.get("patternCodeableConcept")
    if pattern is not None:
        codings = value.get("coding", []) if isinstance(value, dict) else []
        pairs = {(c.get("system"), c.get("code")) for c in codings if isinstance(c, dict)}
        seen = ", ".join(sorted(f"{s}#{c}" for s, c in pairs)) or "no coding"
        for wanted in pattern.get("coding", []):
            if (wanted["system"], wanted["code"]) not in pairs:
                yield _problem(
                    url,
                    where,
                    f"expected the coding {wanted['system']}#{wanted['code']} (the profile), "
                    f"found {seen[:200]}",
                    "code-invalid",
                )
    for key in ("fixedCode", "fixedUri"):
        if key in element and value != element[key]:
            yield _problem(
                url,
                where,
                f"expected {element[key]!r} (a value the profile fixes), found "
                + (f"{value[:64]!r}" if isinstance(value, str) else wording.found(value)),
                "value",
            )
    binding = element.get("binding")
    if binding is not None and binding.get("strength") == "required":
        members = expansion(str(binding["valueSet"])) or frozenset()
        codings = value.get("coding", []) if isinstance(value, dict) else []
        held = [(c.get("system"), c.get("code")) for c in codings if isinstance(c, dict)]
        if not any(pair in members for pair in held):
            seen = ", ".join(f"{s}#{c}" for s, c in held) or "no coding"
            yield _problem(
                url,
                where,
                f"expected a coding from the required value set {binding['valueSet']}, "
                f"found {seen[:200]}",
                "code-invalid",
            )
