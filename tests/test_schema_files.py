"""The generated files in schemas/ agree with the models, and the JSON Schema agrees with the
contract as an independent validator (jsonschema, draft 2020-12) reads it."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from jsonschema import Draft202012Validator

from capnote.schema_files import (
    ANSWERS_SCHEMA,
    CODE_SYSTEM,
    NOTE_SCHEMA,
    REVIEW_SCHEMA,
    generated,
)
from tests.conftest import INVALID, ROOT, VALID
from tests.fhir_r4_check import r4_problems

SCHEMAS = ROOT / "schemas"


@pytest.mark.parametrize("name", [NOTE_SCHEMA, REVIEW_SCHEMA, ANSWERS_SCHEMA, CODE_SYSTEM])
def test_committed_file_matches_the_models(name: str) -> None:
    committed = (SCHEMAS / name).read_bytes()
    assert committed == generated()[name], f"schemas/{name} is stale: run `capnote schema`"


@pytest.mark.parametrize("name", [NOTE_SCHEMA, REVIEW_SCHEMA, ANSWERS_SCHEMA])
def test_schema_is_valid_draft_2020_12(name: str) -> None:
    Draft202012Validator.check_schema(json.loads((SCHEMAS / name).read_text()))


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_demo_notes_satisfy_the_json_schema(path: Path) -> None:
    validator = Draft202012Validator(json.loads((SCHEMAS / NOTE_SCHEMA).read_text()))
    assert [e.message for e in validator.iter_errors(json.loads(path.read_text()))] == []


SCHEMA_LEVEL = {
    "eye-both.json",
    "energy-not-a-number.json",
    "missing-required.json",
    "unknown-field.json",
}


@pytest.mark.parametrize(
    "path", [p for p in INVALID if p.name in SCHEMA_LEVEL], ids=lambda p: p.name
)
def test_contract_breaches_fail_the_json_schema_too(path: Path) -> None:
    validator = Draft202012Validator(json.loads((SCHEMAS / NOTE_SCHEMA).read_text()))
    assert list(validator.iter_errors(json.loads(path.read_text())))


def test_code_system_is_valid_r4() -> None:
    code_system = json.loads((SCHEMAS / CODE_SYSTEM).read_text())
    assert r4_problems(code_system) == []
    codes = [c["code"] for c in code_system["concept"]]
    assert len(codes) == len(set(codes)) == code_system["count"]


REVIEWS = sorted((ROOT / "examples" / "reviews").glob("*.json"))


@pytest.mark.parametrize("path", REVIEWS, ids=lambda p: p.name)
def test_example_reviews_satisfy_the_review_schema_and_the_contract(path: Path) -> None:
    from capnote.review import Review

    schema = Draft202012Validator(json.loads((SCHEMAS / REVIEW_SCHEMA).read_text()))
    data = json.loads(path.read_text())
    assert list(schema.iter_errors(data)) == []
    Review.model_validate_json(path.read_bytes())
    # A finding given as text, not true or false, breaks both (unknown is null, never "no").
    data["findings"] = {"retinal_detachment": "no"}
    assert list(schema.iter_errors(data))
