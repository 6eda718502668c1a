"""What an analyst reads: messages that say what was expected and what was found, never a
regular expression or a pydantic phrase; CSV cells a spreadsheet never runs; a whole .json
file refused unread past its size limit."""

from __future__ import annotations

import copy
import json
import re
from pathlib import Path
from typing import Any

import pytest

from capnote.batch import inputs
from capnote.batch.inputs import Source, records
from capnote.batch.report_csv import cell
from capnote.fhir.validate import validate_resource
from capnote.rules.contract import parse_note
from tests.conftest import EXAMPLES, load, routine

# What a library's wording looks like: none of it may reach an analyst.
LIBRARY_PHRASES = re.compile(
    r"Input should|should match pattern|spec regex|Value error|Invalid JSON|Field required|"
    r"Extra inputs|\^\[|\$'|valid dictionary|instance of"
)


def _procedure() -> dict[str, Any]:
    bundle = load(EXAMPLES / "bundles" / "right-routine.bundle.json")
    # A foreign resource: without the meta.profile capnote's own carry, so only R4 judges.
    return {k: v for k, v in bundle["entry"][0]["resource"].items() if k != "meta"}


def _observation() -> dict[str, Any]:
    bundle = load(EXAMPLES / "bundles" / "right-routine.bundle.json")
    found = next(
        dict(e["resource"])
        for e in bundle["entry"]
        if e["resource"]["resourceType"] == "Observation" and "valueQuantity" in e["resource"]
    )
    found.pop("meta", None)  # as for _procedure: a foreign resource
    return found


def _with(resource: dict[str, Any], path: str, value: Any) -> dict[str, Any]:
    out = copy.deepcopy(resource)
    *parents, last = path.split(".")
    here = out
    for part in parents:
        here = here[part]
    here[last] = value
    return out


def _performed_at(when: Any) -> dict[str, Any]:
    """The example Procedure performed at a dateTime instead of its Period: performed[x]
    has one type at a time (R4 formats.html#choice), so only the dateTime can be wrong."""
    out = _procedure()
    del out["performedPeriod"]
    out["performedDateTime"] = when
    return out


# What no message may hold: a regular expression of R4's primitives (datatypes.html).
RAW_REGEX = re.compile(r"\[[^\]]*\]\{|\[0-9\]|\\S|\\-|\(\?:|\|\(")


# FHIR R4 datatypes (R4 2.24.0.1): Quantity.value is a decimal, Procedure.subject a
# Reference, performedDateTime a dateTime, id an id, note a list of Annotation. The codes
# are those $validate publishes (json.html: the JSON type; datatypes.html: the format;
# the element's cardinality).
@pytest.mark.parametrize(
    ("resource", "location", "message", "code"),
    [
        (
            lambda: _with(_observation(), "valueQuantity.value", True),
            "Observation.valueQuantity.value",
            "expected a decimal number, found true",
            "fhir-json-type",
        ),
        (
            lambda: _with(_procedure(), "subject", "Patient/1"),
            "Procedure.subject",
            "expected a Reference object, found a string",
            "fhir-json-type",
        ),
        (
            lambda: _performed_at("2026-13-45"),
            "Procedure.performedDateTime",
            "expected a FHIR dateTime, found a string",
            "fhir-format",
        ),
        (
            lambda: _with(_procedure(), "id", "a b"),
            "Procedure.id",
            "expected an id (letters, digits, '-' and '.', 1 to 64 of them)",
            "fhir-format",
        ),
        (
            lambda: _with(_procedure(), "note", {"text": "x"}),
            "Procedure.note",
            "expected a list, found an object",
            "fhir-cardinality",
        ),
        (
            lambda: _with(_procedure(), "note", [{"text": 5}]),
            "Procedure.note[0].text",
            "expected a string, found a number",
            "fhir-json-type",
        ),
    ],
)
def test_fhir_messages_say_what_was_expected_and_found(
    resource: Any, location: str, message: str, code: str
) -> None:
    findings = [f for f in validate_resource(resource()) if f.location == location]
    assert findings, validate_resource(resource())
    (f,) = findings
    assert f.message.startswith(f"{location}: {message}")
    for text in (f.message, f.rule, f.allowed or ""):
        assert not LIBRARY_PHRASES.search(text), text
        assert not RAW_REGEX.search(text), text
    assert f.code == code


def test_a_fhir_date_time_finding_gives_the_allowed_forms() -> None:
    (f,) = validate_resource(_performed_at("2026-13-45"))
    assert f.allowed == "YYYY, YYYY-MM, YYYY-MM-DD or YYYY-MM-DDThh:mm:ss+zz:zz"
    assert f.rule.startswith("FHIR R4 datatypes.html#dateTime")
    # A date may be a patient's, so the finding says which part is wrong, not the date
    # (as tests/test_fhir_validate.py asks of a birth date).
    assert f.message.endswith("the month is not 01 to 12")
    assert f.value is None
    assert "2026" not in f.message


def test_a_fhir_json_type_finding_says_why_a_quoted_number_is_refused() -> None:
    # FHIR R4 json.html#primitive: a decimal is a JSON number, so "6.3" (a string) is not.
    (f,) = validate_resource(_with(_observation(), "valueQuantity.value", "6.3"))
    assert f.message == (
        "Observation.valueQuantity.value: expected a decimal number, found a string "
        "(FHIR JSON writes decimal as a JSON number, without quotes)"
    )
    assert (f.code, f.value, f.allowed) == ("fhir-json-type", "6.3", "a JSON number")


def _broken_notes() -> list[tuple[str, dict[str, Any], str, str]]:
    def change(path: str, value: Any) -> dict[str, Any]:
        out = routine()
        *parents, last = path.split(".")
        here: Any = out
        for part in parents:
            here = here[int(part)] if part.isdigit() else here[part]
        if value is KeyError:
            del here[last]
        else:
            here[last] = value
        return out

    return [
        ("eye", change("eye", "middle"), "eye", "expected one of right or left, found a string"),
        (
            "energy",
            change("laser.series.0.energy_mj", "1.6"),
            "laser.series[0].energy_mj",
            "expected a number, found a string",
        ),
        ("status", change("status", KeyError), "status", "required, but missing"),
        (
            "offset",
            change("started_at", "2026-11-27T09:00:00"),
            "started_at",
            "expected a date-time with its UTC offset (such as +00:00), found one without",
        ),
        (
            "id",
            change("note_id", "LN-1"),
            "note_id",
            "expected an object, found a string",
        ),
        (
            "space",
            change("performer.identifier.value", "a b"),
            "performer.identifier.value",
            "expected text without control characters",
        ),
    ]


@pytest.mark.parametrize(
    ("name", "payload", "location", "message"), _broken_notes(), ids=lambda x: str(x)[:12]
)
def test_note_messages_say_what_was_expected_and_found(
    name: str, payload: dict[str, Any], location: str, message: str
) -> None:
    note, findings = parse_note(json.dumps(payload))
    assert note is None
    (f,) = [f for f in findings if f.location == location]
    assert f.message.startswith(f"{location}: {message}"), f.message
    assert not LIBRARY_PHRASES.search(f.message), f.message


def test_json_that_is_not_well_formed_says_so_plainly() -> None:
    _note, (f,) = parse_note("{not json")
    assert f.message.startswith("the payload: not well-formed JSON")
    assert f.code == "json-invalid"


# OWASP, "CSV Injection": a cell that a spreadsheet would run as a formula gets a leading
# apostrophe. Spreadsheets skip leading spaces before "=" and read the full-width forms
# (Unicode's U+FF1D FULLWIDTH EQUALS SIGN and kin, NFKC-equivalent to the ASCII ones) alike.
@pytest.mark.parametrize(
    ("text", "shown"),
    [
        (" =1+1", "' =1+1"),
        ("   @SUM(A1)", "'   @SUM(A1)"),
        ("\uff1d1+1", "'\uff1d1+1"),
        (" \uff1dHYPERLINK(1)", "' \uff1dHYPERLINK(1)"),
        ("\u3000=1", "'\u3000=1"),  # an ideographic space before it
        ("\uff0b41 22", "'\uff0b41 22"),
        ("\uff0d2", "'\uff0d2"),
        ("\uff20SUM(A1)", "'\uff20SUM(A1)"),
        ("a \uff1d b", "a \uff1d b"),
        ("  ", "  "),
    ],
)
def test_the_formula_guard_sees_past_spaces_and_full_width_signs(text: str, shown: str) -> None:
    assert cell(text) == shown


def test_a_whole_json_file_past_the_limit_is_refused_unread(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(inputs, "MAX_FILE_BYTES", 4096)
    big = tmp_path / "big.json"
    big.write_text(json.dumps({"resourceType": "Bundle", "entry": [{"x": "y" * 9000}]}))
    small = tmp_path / "small.json"
    small.write_text(json.dumps(routine()))
    got = list(records([Source(big, False), Source(small, False)]))
    assert got[0].data is None
    assert got[0].failure is not None
    assert got[0].failure.code == "file-too-large"
    assert got[0].size == 4097  # read up to one byte past the limit, never the whole file
    assert got[1].data is not None
