"""Reading what a caller sends besides a note: ids in URLs, amend and void bodies, If-Match.

Each refusal is an InputError with a finding that names the field, so the API answers it with
an OperationOutcome like any other problem.
"""

from __future__ import annotations

import uuid
from typing import Any

import orjson

from capnote.errors import InputError, NotFoundError, PreconditionError
from capnote.findings import refusal


def known_key(key: str) -> str:
    """The key if it has the shape of a note id; anything else cannot name a note."""
    try:
        return str(uuid.UUID(key)) if len(key) == 36 else _no_such_note()
    except ValueError:
        return _no_such_note()


def _no_such_note() -> str:
    raise NotFoundError("no record with this id")


def problem(code: str, location: str, message: str, rule: str) -> InputError:
    """A refusal of a missing or misplaced part of a request (capnote.findings.refusal)."""
    return refusal(code, location, message, rule, issue_type="required")


def check_match(latest: int, if_match: int) -> None:
    """412 when If-Match names a version other than the latest."""
    if if_match != latest:
        raise PreconditionError(f"If-Match names version {if_match} but the latest is {latest}")


REASON_MAX = 500


def reason_text(value: object, *, required: bool) -> str | None:
    """A reason: text of 1 to REASON_MAX characters (required for voids)."""
    if value is None and not required:
        return None
    if not isinstance(value, str) or not value.strip():
        raise problem(
            "missing-field", "reason", "a reason is needed, as text", "reason is a non-empty string"
        )
    if len(value) > REASON_MAX or any(ord(c) < 32 for c in value):
        raise problem(
            "wrong-format",
            "reason",
            f"the reason must be printable text of at most {REASON_MAX} characters",
            f"reason: 1 to {REASON_MAX} printable characters",
        )
    return value.strip()


def json_object(body: bytes, allowed: set[str] | None = None) -> dict[str, Any]:
    try:
        data = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise problem(
            "json-invalid", "", "the body is not valid JSON", "the body must be a JSON object"
        ) from exc
    if not isinstance(data, dict):
        raise problem(
            "wrong-type", "", "the body must be a JSON object", "the body must be a JSON object"
        )
    unknown = sorted(set(data) - allowed) if allowed is not None else []
    if unknown:
        raise problem(
            "unknown-field",
            unknown[0][:40],
            "only " + ", ".join(sorted(allowed or ())) + " may be given",
            "the body's documented fields only",
        )
    return data
