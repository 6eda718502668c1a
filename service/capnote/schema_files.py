"""Generate the contract's JSON Schema and the project CodeSystem as files in schemas/."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import orjson

from capnote.note import Note

NOTE_SCHEMA = "note.schema.json"
REVIEW_SCHEMA = "review.schema.json"
ANSWERS_SCHEMA = "answers.schema.json"
CODE_SYSTEM = "capnote-codesystem.json"
SCHEMA_ID = "https://capnote.org/schemas/note.schema.json"
REVIEW_ID = "https://capnote.org/schemas/review.schema.json"
ANSWERS_ID = "https://capnote.org/schemas/answers.schema.json"


def note_schema() -> dict[str, Any]:
    """The note contract as JSON Schema (draft 2020-12), as the service validates it."""
    schema = Note.model_json_schema(mode="validation")
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", "$id": SCHEMA_ID, **schema}


def review_schema() -> dict[str, Any]:
    """The review visit contract (capnote.review) as JSON Schema (draft 2020-12)."""
    from capnote.review import Review

    schema = Review.model_json_schema(mode="validation")
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", "$id": REVIEW_ID, **schema}


def answers_schema() -> dict[str, Any]:
    """The REST API's JSON answers as JSON Schema: one definition per answer ($defs)."""
    from pydantic.json_schema import models_json_schema

    from capnote.api.answers import ANSWERS

    _keys, schema = models_json_schema(
        [(model, "serialization") for model in ANSWERS], ref_template="#/$defs/{model}"
    )
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": ANSWERS_ID,
        "description": "capnote REST API answers; each answer is one of the $defs named "
        "...Answer (OperationOutcome answers are FHIR R4's own)",
        **schema,
    }


def render(data: dict[str, Any]) -> bytes:
    """Stable bytes for a generated file."""
    return orjson.dumps(data, option=orjson.OPT_INDENT_2 | orjson.OPT_SORT_KEYS) + b"\n"


def generated() -> dict[str, bytes]:
    """File name -> content of every generated file."""
    # Imported here: the CodeSystem lives with the FHIR code, which schemas/ must not need.
    from capnote.fhir.codes import code_system_resource

    return {
        NOTE_SCHEMA: render(note_schema()),
        REVIEW_SCHEMA: render(review_schema()),
        ANSWERS_SCHEMA: render(answers_schema()),
        CODE_SYSTEM: render(code_system_resource()),
    }


def write_schemas(folder: Path) -> list[Path]:
    """Write every generated file into folder."""
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name, content in generated().items():
        path = folder / name
        path.write_bytes(content)
        written.append(path)
    return written
