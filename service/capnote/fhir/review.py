"""The review visit's FHIR transaction Bundle (placeholder until the builder lands: an empty
transaction; replaced in this same piece of work, never released)."""

from __future__ import annotations

from typing import Any

from capnote.fhir.common import Emitted, Version
from capnote.policy.model import RecordPolicy
from capnote.review import Review


def emit_review(
    review: Review,
    session_bundle: dict[str, Any] | None,
    session_roles: tuple[str, ...],
    logmar: float | None,
    version: Version,
    record: RecordPolicy | None = None,
) -> Emitted:
    """The review's transaction Bundle and its entries' roles."""
    del review, session_bundle, session_roles, logmar, version, record
    return Emitted({"resourceType": "Bundle", "type": "transaction", "entry": []}, ())
