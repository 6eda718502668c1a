"""What the OpenAPI document says about bodies and errors (examples come from examples/)."""

from __future__ import annotations

import json
from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from capnote.api.answers import ANSWERS
from capnote.demo_notes import demo_notes
from capnote.note import Note
from capnote.review import Review

_NOTE_REF = {"$ref": "#/components/schemas/Note"}
_OUTCOME_REF = {"$ref": "#/components/schemas/OperationOutcome"}
_REVIEW_REF = {"$ref": "#/components/schemas/Review"}

NOTE_BODY: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {"application/json": {"schema": _NOTE_REF}},
    }
}
AMEND_BODY: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "required": ["note"],
                    "additionalProperties": False,
                    "properties": {
                        "reason": {"type": "string", "maxLength": 500},
                        "note": _NOTE_REF,
                    },
                }
            }
        },
    }
}
REVIEW_BODY: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {"application/json": {"schema": _REVIEW_REF}},
    }
}
REVIEW_AMEND_BODY: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "required": ["review"],
                    "additionalProperties": False,
                    "properties": {
                        "reason": {"type": "string", "maxLength": 500},
                        "review": _REVIEW_REF,
                    },
                }
            }
        },
    }
}
CHECK_BODY: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "description": "A note, complete or not: every problem comes back as a finding",
        "content": {"application/json": {"schema": {"type": "object"}}},
    }
}
VOID_BODY: dict[str, Any] = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "required": ["reason"],
                    "properties": {"reason": {"type": "string", "minLength": 1, "maxLength": 500}},
                }
            }
        },
    }
}
_MEANING = {
    200: "done; the body is the result",
    201: "stored; the body is the stored version",
    400: "the request is malformed",
    401: "no token, or an unknown or revoked one",
    403: "the token's role may not do this",
    404: "no such record",
    409: "the identifier is taken by different content, or the note is voided",
    412: "If-Match names a version that is not the latest",
    413: "the body is over the size limit",
    415: "the body is not JSON",
    422: "the input breaks the contract or a blocking rule; every problem is listed",
    428: "If-Match is missing: read the note and send its ETag",
    500: "an unexpected failure; only an incident id is given",
    503: "the database is not reachable; retry after Retry-After seconds",
}


def responses(
    *codes: int, media: str = "application/json", model: type[BaseModel] | None = None
) -> dict[int | str, dict[str, Any]]:
    """The documented answers of a route: its successes (in media, shaped as model when
    given: capnote.api.answers) and every error it can give."""
    out: dict[int | str, dict[str, Any]] = {}
    success = (
        {} if model is None else {"schema": {"$ref": f"#/components/schemas/{model.__name__}"}}
    )
    for code in sorted({*codes, 401, 403, 413, 415, 422, 500, 503}):
        if code < 400:
            out[code] = {"description": _MEANING[code], "content": {media: success}}
        else:
            out[code] = {
                "description": _MEANING[code],
                "content": {"application/fhir+json": {"schema": _OUTCOME_REF}},
            }
    return out


def _examples() -> dict[str, Any]:
    out = {}
    for path in demo_notes():
        stem = path.name.removesuffix(".json")
        out[stem] = {"summary": stem.replace("-", " "), "value": json.loads(path.read_text())}
    return out


_OUTCOME_SCHEMA = {
    "type": "object",
    "required": ["resourceType", "issue"],
    "description": "FHIR R4 OperationOutcome",
    "properties": {
        "resourceType": {"const": "OperationOutcome"},
        "issue": {
            "type": "array",
            "minItems": 1,
            "items": {
                "type": "object",
                "required": ["severity", "code"],
                "properties": {
                    "severity": {"enum": ["fatal", "error", "warning", "information"]},
                    "code": {"type": "string"},
                    "diagnostics": {"type": "string"},
                    "details": {"type": "object"},
                    "expression": {"type": "array", "items": {"type": "string"}},
                },
            },
        },
    },
}


def install(app: FastAPI) -> None:
    """Give the app an OpenAPI document with the note contract and real examples."""

    def document() -> dict[str, Any]:
        if app.openapi_schema is not None:
            return app.openapi_schema
        spec = get_openapi(
            title=app.title, version=app.version, description=app.description, routes=app.routes
        )
        schemas = spec.setdefault("components", {}).setdefault("schemas", {})
        _keys, answers = models_json_schema(
            [(model, "serialization") for model in ANSWERS],
            ref_template="#/components/schemas/{model}",
        )
        schemas.update(answers["$defs"])
        # The note as a request body: the contract as the service validates it.
        note = Note.model_json_schema(ref_template="#/components/schemas/{model}")
        schemas.update(note.pop("$defs", {}))
        schemas["Note"] = note
        review = Review.model_json_schema(ref_template="#/components/schemas/{model}")
        schemas.update(review.pop("$defs", {}))
        schemas["Review"] = review
        schemas["OperationOutcome"] = _OUTCOME_SCHEMA
        examples = _examples()
        for path in spec["paths"].values():
            for operation in path.values():
                body = operation.get("requestBody", {}).get("content", {}).get("application/json")
                if body is not None and body.get("schema") == _NOTE_REF:
                    body["examples"] = examples
        app.openapi_schema = spec
        return spec

    app.openapi = document  # type: ignore[method-assign]
