"""Which requests the audit trail records, and as what (pure; the API's middleware writes).

Every read and search of patient data, every refused request, and every change is recorded.
A change that was stored is recorded with its version, in the same transaction (capnote.notes),
so here only the refused ones are; checks and validations read nothing stored and are not.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

_UUID = r"[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}"
_NOTE = re.compile(rf"^/notes/({_UUID})(?:/|$)")
_REVIEW = re.compile(rf"^/reviews/({_UUID})(?:/|$)")
_FHIR_ID = re.compile(rf"^/fhir/[A-Za-z]+/({_UUID})(?:[-/]|$)")
# Served without patient data: the server's own description and conformance resources.
_NOT_PATIENT_DATA = (
    "/fhir/metadata",
    "/fhir/StructureDefinition",
    "/fhir/CodeSystem",
    "/fhir/ValueSet",
)
DETAIL_MAX = 500


@dataclass(frozen=True, slots=True)
class Access:
    """What an audit entry says about one request."""

    action: str  # read, search, audit-read, or create / amend / void when refused
    note_key: str | None
    outcome: str  # "ok", or the HTTP status of a refusal
    detail: str  # the method, the path and the search: identifiers only


def audited(method: str, path: str, query: str, status: int) -> Access | None:
    """The audit entry a request makes, or None for one that is not recorded."""
    outcome = "ok" if status < 400 else str(status)
    if path.startswith("/audit") or path.startswith("/fhir/AuditEvent"):
        return Access("audit-read", None, outcome, _detail(method, path, query))
    if path.startswith("/notes"):
        if path == "/notes/check":
            return None
        change = _change(method, path)
        if change is not None:
            if status < 400:
                return None  # stored, and recorded with its version
            return Access(change, _key(_NOTE, path), outcome, _detail(method, path, query))
        action = "search" if path == "/notes" else "read"
        return Access(action, _key(_NOTE, path), outcome, _detail(method, path, query))
    if path == "/reviews" or path.startswith("/reviews/"):
        # Review visit records are patient data like notes; their actions say "review-".
        if path == "/reviews/check":
            return None
        change = _change(method, path, "/reviews")
        if change is not None:
            if status < 400:
                return None  # stored, and recorded with its version (capnote.reviews)
            key = _key(_REVIEW, path)
            return Access(f"review-{change}", key, outcome, _detail(method, path, query))
        return Access("review-read", _key(_REVIEW, path), outcome, _detail(method, path, query))
    if path.startswith("/fhir/"):
        if path.startswith(_NOT_PATIENT_DATA) or "$validate" in path:
            return None
        key = _key(_FHIR_ID, path)
        action = "search" if key is None and path.count("/") <= 3 else "read"
        return Access(action, key, outcome, _detail(method, path, query))
    return None


def _change(method: str, path: str, collection: str = "/notes") -> str | None:
    if method == "POST" and path == collection:
        return "create"
    if method == "PUT":
        return "amend"
    if method == "POST" and path.endswith("/void"):
        return "void"
    return None


def _key(pattern: re.Pattern[str], path: str) -> str | None:
    match = pattern.match(path)
    return match[1].lower() if match else None


def _detail(method: str, path: str, query: str) -> str:
    text = f"{method} {path}" + (f"?{query}" if query else "")
    # The caller's text: kept printable and within the column, alike on both engines.
    text = "".join(c if c.isprintable() else "?" for c in text)
    return text if len(text) <= DETAIL_MAX else text[: DETAIL_MAX - 1] + "…"
