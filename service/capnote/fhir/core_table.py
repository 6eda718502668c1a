"""What FHIR R4 allows, read from the generated table r4_core.json (see core_build).

Loaded on first use and kept: the table is about 700 kB of JSON, read in a few
milliseconds, and only validation needs it.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson

_TABLE = Path(__file__).with_name("r4_core.json")


@dataclass(frozen=True, slots=True)
class ElementRule:
    """One element definition: where it sits, how often, of which types."""

    path: str  # the element's path in its type's definition: "Observation.value[x]"
    name: str  # its JSON name without [x]: "value"
    choice: bool
    min: int
    many: bool
    max_one: bool
    types: tuple[str, ...]
    targets: dict[str, tuple[str, ...]]  # type code -> allowed target types (Reference...)
    value_set: str | None  # required binding
    content_reference: str | None


@functools.cache
def table() -> dict[str, Any]:
    """The whole generated table."""
    data: dict[str, Any] = orjson.loads(_TABLE.read_bytes())
    return data


def package() -> str:
    """The package the table was generated from, "hl7.fhir.r4.core#4.0.1"."""
    return str(table()["package"])


def is_resource_type(name: object) -> bool:
    """A concrete (not abstract) FHIR R4 resource type."""
    if not isinstance(name, str):
        return False
    kind = table()["types"].get(name)
    return kind is not None and kind["kind"] == "resource" and not kind["abstract"]


def is_type(name: str) -> bool:
    """Any R4 type with elements of its own (a resource or a complex data type)."""
    return name in table()["types"]


@functools.cache
def primitive_regex(code: str) -> re.Pattern[str] | None:
    """The primitive type's value format from the package, or None (xhtml, unknown)."""
    pattern = table()["primitives"].get(code)
    return re.compile(pattern) if pattern else None


def is_primitive(code: str) -> bool:
    """True for the R4 primitive types (boolean, string, dateTime, ...)."""
    return code in table()["primitives"]


@functools.cache
def children(type_name: str, parent: str) -> dict[str, ElementRule]:
    """The elements directly below parent (a path in type_name's definition), by JSON name."""
    out: dict[str, ElementRule] = {}
    elements: dict[str, list[Any]] = table()["types"][type_name]["elements"]
    prefix = parent + "."
    for path, (low, high, types, value_set, reference) in elements.items():
        if not path.startswith(prefix) or "." in path[len(prefix) :]:
            continue
        last = path[len(prefix) :]
        choice = last.endswith("[x]")
        name = last.removesuffix("[x]")
        codes = tuple(t if isinstance(t, str) else t[0] for t in types)
        targets = {t[0]: tuple(t[1]) for t in types if not isinstance(t, str)}
        out[name] = ElementRule(
            path=path,
            name=name,
            choice=choice,
            min=int(low),
            many=high != "1" and high != "0",
            max_one=high == "1",
            types=codes,
            targets=targets,
            value_set=value_set,
            content_reference=reference,
        )
    return out


@functools.cache
def choice_names(type_name: str, parent: str) -> dict[str, tuple[ElementRule, str]]:
    """valueQuantity -> (the value[x] rule, "Quantity"): the JSON names of every choice."""
    out: dict[str, tuple[ElementRule, str]] = {}
    for rule in children(type_name, parent).values():
        if rule.choice:
            for code in rule.types:
                suffix = "Quantity" if code == "SimpleQuantity" else code
                out[rule.name + suffix[:1].upper() + suffix[1:]] = (rule, code)
    return out


def root_path(type_name: str) -> str:
    """The path its elements start with (a type's own name in R4's definitions)."""
    return type_name


@functools.cache
def value_set(url: str) -> frozenset[tuple[str, str]] | None:
    """(system, code) members of a required value set; None when it cannot be expanded here."""
    members = table()["valueSets"].get(url)
    if members is None:
        return None
    return frozenset((system, code) for system, code in members)


@functools.cache
def value_set_codes(url: str) -> frozenset[str] | None:
    """The codes of a required value set, whatever their system (for code elements)."""
    members = value_set(url)
    return None if members is None else frozenset(code for _, code in members)


def unexpandable(url: str) -> str | None:
    """Why a required value set is not checked here (ISO 4217, BCP 13, UCUM), or None."""
    reason = table()["unexpandable"].get(url)
    return None if reason is None else str(reason)


def invariant(key: str) -> tuple[str, str]:
    """(expression, human text) of a core invariant, as the package words it."""
    entry = table()["invariants"][key]
    return str(entry["expression"]), str(entry["human"])


@functools.cache
def narrative_whitelist() -> tuple[frozenset[str], frozenset[str]]:
    """txt-1's allowed XHTML element and attribute names."""
    narrative = table()["narrative"]
    return frozenset(narrative["elements"]), frozenset(narrative["attributes"])
