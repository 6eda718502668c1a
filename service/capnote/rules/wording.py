"""A parse error said in the reader's terms: what was expected and what was found.

pydantic's own messages ("Input should be a valid dictionary", "String should match pattern
'^[^\\s]+$'", fhir.resources' "Decimal value string does not match spec regex") name the
library, not the data: an interface analyst cannot act on a regular expression. Every
message here says what the place expects, in the words of JSON and FHIR, and what kind of
value was there, never the value itself (the finding's value field shows that, withheld
where it identifies someone).
"""

from __future__ import annotations

import re
from typing import Any

from pydantic_core import ErrorDetails

from capnote.fhir.wording import found  # one wording of "what was there" for both

# FHIR R4 primitive types (R4 2.24.0.1 "Primitive Types") as fhir.resources names them in
# "<Name> value string does not match spec regex", and what each one accepts.
FHIR_PRIMITIVES: dict[str, tuple[str, str | None]] = {
    "Decimal": ("a decimal number", "a JSON number, such as 1.5"),
    "Integer": ("a whole number", "a JSON whole number"),
    "Integer64": ("a whole number", "a whole number as a string"),
    "PositiveInt": ("a whole number of 1 or more", ">= 1"),
    "UnsignedInt": ("a whole number of 0 or more", ">= 0"),
    "Boolean": ("true or false", "true, false"),
    "String": ("text", None),
    "Markdown": ("text", None),
    "Code": ("a code (text without leading or trailing spaces)", None),
    "Id": ("an id (letters, digits, '-' and '.', 1 to 64 of them)", "[A-Za-z0-9-.]{1,64}"),
    "Uri": ("a URI (no spaces)", None),
    "Url": ("a URL (no spaces)", None),
    "Canonical": ("a canonical URL (no spaces)", None),
    "Oid": ("an OID as a URI (urn:oid:1.2.3)", "urn:oid:..."),
    "Uuid": ("a UUID as a URI (urn:uuid:...)", "urn:uuid:..."),
    "Base64Binary": ("base64-encoded data", None),
    "Date": ("a FHIR date", "YYYY, YYYY-MM or YYYY-MM-DD"),
    "DateTime": (
        "a FHIR dateTime",
        "YYYY, YYYY-MM, YYYY-MM-DD or YYYY-MM-DDThh:mm:ss+zz:zz",
    ),
    "Instant": ("a FHIR instant (a full date-time with its offset)", "YYYY-MM-DDThh:mm:ss+zz:zz"),
    "Time": ("a time of day", "hh:mm:ss"),
}
_SPEC_REGEX = re.compile(r"(?:Value error, )?(\w+) value string does not match spec regex\.?")

# pydantic error type -> what the place expects
_EXPECTED: dict[str, str] = {
    "float_type": "a number",
    "float_parsing": "a number",
    "decimal_type": "a number",
    "decimal_parsing": "a number",
    "int_type": "a whole number",
    "int_parsing": "a whole number",
    "int_from_float": "a whole number",
    "bool_type": "true or false",
    "bool_parsing": "true or false",
    "string_type": "a string",
    "list_type": "a list",
    "tuple_type": "a list",
    "dict_type": "an object",
    "model_type": "an object",
    "model_attributes_type": "an object",
    "date_type": "a date, as YYYY-MM-DD",
    "date_parsing": "a date that exists, as YYYY-MM-DD",
    "date_from_datetime_parsing": "a date that exists, as YYYY-MM-DD",
    "datetime_type": "a date-time with its UTC offset, as YYYY-MM-DDThh:mm:ss+hh:mm",
    "datetime_parsing": "a date-time that exists, as YYYY-MM-DDThh:mm:ss+hh:mm",
    "datetime_from_date_parsing": "a date-time that exists, as YYYY-MM-DDThh:mm:ss+hh:mm",
    "timezone_aware": "a date-time with its UTC offset, such as +00:00",
    "finite_number": "a finite number",
    "string_pattern_mismatch": "text without control characters (identifiers and URIs "
    "also without spaces)",
}
_BOUNDS = (("ge", ">="), ("gt", ">"), ("le", "<="), ("lt", "<"))


def primitive(error: ErrorDetails) -> tuple[str, str | None] | None:
    """For fhir.resources' "<Name> value string does not match spec regex": what the FHIR
    primitive accepts, and its allowed form."""
    m = _SPEC_REGEX.fullmatch(error["msg"])
    if m is None:
        return None
    return FHIR_PRIMITIVES.get(m[1], (f"a valid FHIR {m[1]}", None))


def expectation(error: ErrorDetails, expected_object: str | None = None) -> str:
    """What the place expects, as a phrase: "a Reference object", "a number >= 0"."""
    kind = error["type"]
    ctx: dict[str, Any] = dict(error.get("ctx") or {})
    if expected_object is not None and kind in ("json_invalid", "model_type", "dict_type"):
        return f"a {expected_object} object"
    if kind == "model_validation_format" and ctx.get("model_class"):
        return f"a {ctx['model_class']} object"
    if kind in ("missing",):
        return "a value"
    if kind in ("literal_error", "enum"):
        return f"one of {str(ctx.get('expected', '')).replace(chr(39), '')}"
    bounds = [f"{op} {ctx[key]}" for key, op in _BOUNDS if key in ctx]
    if bounds:
        return "a number " + " and ".join(bounds)
    if "min_length" in ctx or "max_length" in ctx:
        low, high = ctx.get("min_length", 0), ctx.get("max_length")
        what = "characters" if kind.startswith("string") else "items"
        return f"{low} or more {what}" if high is None else f"{low} to {high} {what}"
    shape = primitive(error)
    if shape is not None:
        return shape[0]
    if kind == "string_pattern_mismatch" and "A-Za-z0-9" in str(ctx.get("pattern", "")):
        return FHIR_PRIMITIVES["Id"][0]  # the one FHIR pattern fhir.resources checks this way
    return _EXPECTED.get(kind, "a valid value")


def message(error: ErrorDetails, where: str, *, expected_object: str | None = None) -> str:
    """The finding's message: the place, what it expects and what it holds."""
    kind = error["type"]
    value = error.get("input")
    if kind == "missing":
        return f"{where}: required, but missing"
    if kind == "extra_forbidden":
        return f"{where}: not a field that is allowed here"
    if kind in ("json_invalid", "json_type") and expected_object is None:
        detail = str((error.get("ctx") or {}).get("error", "")).strip()
        return f"{where}: not well-formed JSON" + (f" ({detail})" if detail else "")
    expected = expectation(error, expected_object)
    if any(key in (error.get("ctx") or {}) for key, _op in _BOUNDS):
        return f"{where}: expected {expected}"  # the finding's value field shows what it was
    if kind == "json_invalid":  # a string where an object belongs, tried as JSON text
        return f"{where}: expected {expected}, found a string"
    if kind == "string_pattern_mismatch":  # the value is a string; say what is wrong with it
        return f"{where}: expected {expected}; the string has a character not allowed here"
    if kind in ("too_short", "too_long", "string_too_short", "string_too_long"):
        length = (error.get("ctx") or {}).get("actual_length")
        got = f"found {length}" if length is not None else f"found {found(value)}"
        return f"{where}: expected {expected}, {got}"
    if kind == "timezone_aware":
        return (
            f"{where}: expected a date-time with its UTC offset (such as +00:00), found one without"
        )
    if kind == "value_error" and primitive(error) is None:
        text = error["msg"].removeprefix("Value error, ").rstrip(".")
        return f"{where}: {text}"
    return f"{where}: expected {expected}, found {found(value)}"
