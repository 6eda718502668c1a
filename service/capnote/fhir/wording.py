"""What a FHIR R4 primitive expects, in an interface analyst's words, never as a regex.

The conformance walk (capnote.fhir.conformance) says every finding as "<FHIRPath>:
expected <what>, found <what>" (issue 18 §4). The regular expressions of R4 (datatypes.html,
"Primitive Types") judge the values; the phrases and forms here only tell the reader what
those expressions accept.
"""

from __future__ import annotations

from datetime import date
from typing import Any

# R4 primitive -> (what it is, its allowed forms or None where the phrase says it all)
PRIMITIVES: dict[str, tuple[str, str | None]] = {
    "boolean": ("true or false", "true, false"),
    "integer": ("a whole number", "-2147483648 to 2147483647"),
    "unsignedInt": ("a whole number of 0 or more", "0 to 2147483647"),
    "positiveInt": ("a whole number of 1 or more", "1 to 2147483647"),
    "decimal": ("a decimal number", "a JSON number, such as 1.5"),
    "string": ("a string", "text that is not empty"),
    "markdown": ("a string", "text that is not empty"),
    "code": (
        "a code (text without leading, trailing or double spaces)",
        "text without leading, trailing or double spaces",
    ),
    "id": (
        "an id (letters, digits, '-' and '.', 1 to 64 of them)",
        "letters, digits, '-' and '.', 1 to 64 of them",
    ),
    "uri": ("a URI (no spaces)", "text without spaces"),
    "url": ("a URL (no spaces)", "text without spaces"),
    "canonical": ("a canonical URL (no spaces)", "text without spaces"),
    "oid": ("an OID as a URI", "urn:oid: and numbers separated by dots, such as urn:oid:1.2.3"),
    "uuid": ("a UUID as a URI", "urn:uuid: and a lower-case UUID"),
    "base64Binary": ("base64-encoded data", "groups of four of A-Z a-z 0-9 + / ="),
    "date": ("a FHIR date", "YYYY, YYYY-MM or YYYY-MM-DD"),
    "dateTime": (
        "a FHIR dateTime",
        "YYYY, YYYY-MM, YYYY-MM-DD or YYYY-MM-DDThh:mm:ss+zz:zz",
    ),
    "instant": (
        "a FHIR instant (a full date and time with its offset)",
        "YYYY-MM-DDThh:mm:ss+zz:zz (or Z for UTC)",
    ),
    "time": ("a time of day", "hh:mm:ss"),
}


def expected(code: str) -> str:
    """What a value of the primitive is: "a decimal number", "a FHIR dateTime"."""
    return PRIMITIVES.get(code, (f"a FHIR {code}", None))[0]


def forms(code: str) -> str | None:
    """The primitive's allowed forms, for a finding's allowed field."""
    return PRIMITIVES.get(code, ("", None))[1]


def found(value: Any) -> str:
    """What kind of JSON value was there: a string, a number, an object, a list, true..."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return "a number"
    if isinstance(value, str):
        return "an empty string" if value == "" else "a string"
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, list | tuple):
        return "an empty list" if not value else "a list"
    return "another kind of value"


def date_fault(code: str, value: str) -> str | None:
    """Which part of a date, dateTime, instant or time is wrong, said without the value
    (a date may be a patient's): "the month is not 01 to 12"."""
    if code == "time":
        return _time_fault(value)
    day, _, clock = value.partition("T")
    parts = day.split("-")
    if not _digits(parts[0], 4):
        return "the year is not four digits"
    if len(parts) > 1 and not _digits(parts[1], 2):
        return "the month is not two digits"
    if len(parts) > 1 and not 1 <= int(parts[1]) <= 12:
        return "the month is not 01 to 12"
    if len(parts) > 2 and not _digits(parts[2], 2):
        return "the day is not two digits"
    if len(parts) > 2 and not 1 <= int(parts[2]) <= 31:
        return "the day is not 01 to 31"
    if len(parts) > 3:
        return "the date has more than year, month and day"
    if code == "date" and "T" in value:
        return "a date has no time of day"
    if len(parts) < 3 and "T" in value:
        return "a time of day needs a full date before it"
    if code == "instant" and not clock:
        return "an instant needs the time of day and its offset"
    if clock:
        offset = clock[8:].lstrip(".0123456789")
        fault = _time_fault(clock[: len(clock) - len(offset)])
        if fault is not None:
            return fault
        if not offset:
            return "a time of day needs its UTC offset (Z or such as +01:00)"
        if offset != "Z" and not (
            len(offset) == 6 and offset[0] in "+-" and offset[3] == ":" and _digits(offset[1:3], 2)
        ):
            return "the offset is not Z or +hh:mm / -hh:mm"
    if len(parts) == 3:
        try:
            date.fromisoformat(day)
        except ValueError:
            return "that day does not exist in that month"
    return None


def _time_fault(clock: str) -> str | None:
    hh, mm, ss = [*clock.split(":"), "", "", ""][:3]
    seconds = ss.split(".")[0]
    if not all(_digits(p, 2) for p in (hh, mm, seconds)):
        return "the time of day is not hh:mm:ss"
    if int(hh) > 23 or int(mm) > 59 or int(seconds) > 60:
        return "the time of day is not 00:00:00 to 23:59:60"
    return None


def _digits(text: str, count: int) -> bool:
    """count ASCII digits (str.isdigit alone takes "²", which int() refuses)."""
    return len(text) == count and text.isascii() and text.isdigit()
