"""Parse a payload into the note contract; every parse error becomes a finding."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, TypeVar

from pydantic import BaseModel, ValidationError
from pydantic_core import ErrorDetails

from capnote.findings import FINDINGS_MAX, Finding, Severity, left_out, show_value
from capnote.note import Note
from capnote.rules.wording import message, primitive

M = TypeVar("M", bound=BaseModel)

RULE = "the note contract (schemas/note.schema.json)"


# A key echoed in a location is cut to this many characters: keys are the sender's text.
KEY_MAX = 64


def json_path(loc: Sequence[int | str]) -> str:
    """A pydantic error location as a FHIRPath-style path: ``laser.series[0].energy_mj``
    (a key longer than KEY_MAX characters cut, ending in "...")."""
    path = ""
    for part in loc:
        if isinstance(part, int):
            path += f"[{part}]"
        else:
            key = part if len(part) <= KEY_MAX else part[: KEY_MAX - 3] + "..."
            path += f".{key}" if path else key
    return path


# pydantic error type -> (finding code, FHIR issue type, what the rule is)
_KINDS: dict[str, tuple[str, str, str]] = {
    "missing": ("missing-field", "required", "the field is required"),
    "extra_forbidden": (
        "unknown-field",
        "structure",
        "only fields of the note contract are allowed",
    ),
    "json_invalid": ("json-invalid", "structure", "the payload must be well-formed JSON"),
    "json_type": ("json-invalid", "structure", "the payload must be JSON"),
    "model_type": ("wrong-type", "structure", "this part must be a JSON object"),
    "model_attributes_type": ("wrong-type", "structure", "this part must be a JSON object"),
    "literal_error": (
        "code-not-allowed",
        "code-invalid",
        "the value must be one of the allowed codes",
    ),
    "date_parsing": ("date-invalid", "value", "a date that exists, as YYYY-MM-DD"),
    "date_from_datetime_parsing": ("date-invalid", "value", "a date that exists, as YYYY-MM-DD"),
    "date_type": ("date-invalid", "value", "a date that exists, as YYYY-MM-DD"),
    "datetime_parsing": ("datetime-invalid", "value", "a date-time that exists, ISO 8601"),
    "datetime_from_date_parsing": (
        "datetime-invalid",
        "value",
        "a date-time that exists, ISO 8601",
    ),
    "datetime_type": ("datetime-invalid", "value", "a date-time that exists, ISO 8601"),
    "timezone_aware": ("datetime-no-offset", "value", "a date-time with a UTC offset"),
    "finite_number": ("number-not-finite", "value", "numbers must be finite"),
}
_TYPE_RULES = {
    "float_type": "a number",
    "float_parsing": "a number",
    "int_type": "a whole number",
    "int_parsing": "a whole number",
    "int_from_float": "a whole number",
    "bool_type": "true or false",
    "bool_parsing": "true or false",
    "string_type": "text",
    "list_type": "a list",
}
_ALLOWED = {
    "missing": None,
    "date_parsing": "YYYY-MM-DD",
    "date_from_datetime_parsing": "YYYY-MM-DD",
    "datetime_parsing": "YYYY-MM-DDThh:mm:ss+hh:mm",
    "timezone_aware": "YYYY-MM-DDThh:mm:ss+hh:mm",
}


def _allowed(error: ErrorDetails) -> str | None:
    ctx: dict[str, Any] = dict(error.get("ctx") or {})
    kind = error["type"]
    if kind == "literal_error":
        return str(ctx.get("expected", "")).replace("'", "")
    if "min_length" in ctx or "max_length" in ctx:
        low, high = ctx.get("min_length"), ctx.get("max_length")
        return f"length {low if low is not None else 0} to {high if high is not None else 'any'}"
    bounds = [
        f"{op} {ctx[key]}"
        for key, op in (("ge", ">="), ("gt", ">"), ("le", "<="), ("lt", "<"))
        if key in ctx
    ]
    if bounds:
        return " and ".join(bounds)
    if "pattern" in ctx:
        return "printable text (identifiers and URIs without spaces)"
    shape = primitive(error)
    if shape is not None:
        return shape[1]
    return _ALLOWED.get(kind)


def finding_from_error(
    error: ErrorDetails,
    *,
    root: str = "",
    code: str | None = None,
    rule: str = RULE,
    expected: str | None = None,
) -> Finding:
    """One pydantic error as a finding; the message never repeats identifying values.

    The one mapping for every model capnote validates with: the note contract (the
    defaults), a FHIR resource (``root`` is its type, ``rule`` the structure rule,
    ``expected`` the FHIR type the place holds, such as Reference) and the request's
    parameters. ``code`` replaces the per-kind finding code where a caller's findings share
    one. The message says what was expected and what was found (capnote.rules.wording),
    never pydantic's own phrase.
    """
    kind = error["type"]
    path = json_path(error["loc"])
    location = ".".join(p for p in (root, path) if p)
    if kind in _KINDS:
        kind_code, issue_type, what = _KINDS[kind]
    elif kind in _TYPE_RULES:
        kind_code, issue_type, what = (
            "wrong-type",
            "value",
            f"the value must be {_TYPE_RULES[kind]}",
        )
    elif kind in ("too_short", "too_long", "string_too_short", "string_too_long"):
        kind_code, issue_type, what = "wrong-length", "value", "the length must be within the rule"
    elif kind == "string_pattern_mismatch":
        kind_code, issue_type, what = (
            "wrong-format",
            "value",
            "no control characters; identifiers and URIs have no spaces",
        )
    elif (shape := primitive(error)) is not None:
        kind_code, issue_type, what = "wrong-format", "value", f"the value must be {shape[0]}"
    else:
        kind_code, issue_type, what = "invalid-value", "invalid", "the value must be valid here"
    if expected is not None and kind in ("json_invalid", "model_type", "dict_type"):
        what = f"this part must be a {expected} object"
        kind_code, issue_type = "wrong-type", "structure"
    elif kind == "model_validation_format" and (error.get("ctx") or {}).get("model_class"):
        what = f"this part must be a {error.get('ctx', {})['model_class']} object"
        kind_code, issue_type = "wrong-type", "structure"
    where = location or "the payload"
    value = (
        None
        if kind in ("missing", "json_invalid", "extra_forbidden")
        else show_value(path, error.get("input"))
    )
    return Finding(
        severity=Severity.ERROR,
        code=code or kind_code,
        location=location,
        message=message(error, where, expected_object=expected),
        rule=f"{what} ({rule})",
        value=value,
        allowed=_allowed(error),
        issue_type=issue_type,
    )


def parse_note(payload: bytes | str) -> tuple[Note | None, list[Finding]]:
    """The note, or None with a finding for every contract error."""
    return parse_as(Note, payload)


def parse_as(model: type[M], payload: bytes | str) -> tuple[M | None, list[Finding]]:
    """A record of the given contract (a note, a review), or None with a finding for every
    contract error."""
    try:
        return model.model_validate_json(payload), []
    except ValidationError as exc:
        errors = exc.errors(include_url=False)
        # Only the findings an answer lists are built (90,000 unknown keys took 2 s more).
        findings = [finding_from_error(e) for e in errors[:FINDINGS_MAX]]
        if len(errors) > FINDINGS_MAX:
            findings.append(left_out(len(errors) - FINDINGS_MAX, Severity.ERROR))
        return None, findings
