"""The audit trail as FHIR R4 AuditEvent resources (https://hl7.org/fhir/R4/auditevent.html).

Each entry becomes one AuditEvent: what kind of event (a RESTful operation on the API, a
delivery to the receiver, a token made or revoked), the interaction, its action code, when,
its outcome (0 success, 4 the request was refused, 8 a server failed), who (the token's
person or client, by token id), from where, and what it touched (the note's Procedure, the
search asked for). Identifiers only: no clinical values.
"""

from __future__ import annotations

import base64
from typing import Any, Final

from capnote.fhir.codes import CANONICAL
from capnote.fhir.provenance import TOKEN_SYSTEM
from capnote.store.base import AuditRecord

EVENT_TYPE: Final = "http://terminology.hl7.org/CodeSystem/audit-event-type"
DICOM: Final = "http://dicom.nema.org/resources/ontology/DCM"
INTERACTION: Final = "http://hl7.org/fhir/restful-interaction"
ENTITY_TYPE: Final = "http://terminology.hl7.org/CodeSystem/audit-entity-type"
# capnote's ids of review visit records (capnote.reviews), as an identifier system.
REVIEW_RECORD: Final = f"{CANONICAL}/sid/review-record"

_REST = {"system": EVENT_TYPE, "code": "rest", "display": "RESTful Operation"}
# DICOM audit message types (DICOM PS3.15 A.5.3; DCM codes in PS3.16).
_EXPORT = {"system": DICOM, "code": "110106", "display": "Export"}
_SECURITY = {"system": DICOM, "code": "110137", "display": "User Security Attributes Changed"}

# action -> (event type, interaction subtype or None, AuditEventAction code)
_KINDS: dict[str, tuple[dict[str, str], str | None, str]] = {
    "read": (_REST, "read", "R"),
    "search": (_REST, "search-type", "R"),
    "audit-read": (_REST, "search-type", "R"),
    "create": (_REST, "create", "C"),
    "amend": (_REST, "update", "U"),
    "recount": (_REST, "update", "U"),
    "reviewed": (_REST, "update", "U"),
    # A void stores a version that marks everything entered in error: a logical delete.
    "void": (_REST, "update", "D"),
    "review-read": (_REST, "read", "R"),
    "review-create": (_REST, "create", "C"),
    "review-amend": (_REST, "update", "U"),
    "review-void": (_REST, "update", "D"),
    "deliver": (_EXPORT, None, "E"),
    "token-create": (_SECURITY, None, "C"),
    "token-revoke": (_SECURITY, None, "D"),
}


def outcome_code(outcome: str) -> str:
    """AuditEvent.outcome of a stored outcome: 0 success, 8 a server's failure, 4 refused."""
    if outcome == "ok":
        return "0"
    if outcome.startswith(("5", "retry-5")) or outcome == "retry-network":
        return "8"
    return "4"


def audit_event(entry: AuditRecord) -> dict[str, Any]:
    """One audit entry as an AuditEvent."""
    kind, subtype, action = _KINDS.get(entry.action, (_REST, None, "E"))
    agent: dict[str, Any] = {"who": {"display": entry.actor}, "requestor": True}
    if entry.token_id is not None:
        agent["who"]["identifier"] = {"system": TOKEN_SYSTEM, "value": str(entry.token_id)}
    if entry.role not in ("-", ""):
        agent["role"] = [{"text": entry.role}]
    if entry.remote:
        agent["network"] = {"address": entry.remote, "type": "2"}  # 2: an IP address
    event: dict[str, Any] = {
        "resourceType": "AuditEvent",
        "id": str(entry.id),
        "meta": {"lastUpdated": entry.at.isoformat()},
        "type": kind,
        "action": action,
        "recorded": entry.at.isoformat(),
        "outcome": outcome_code(entry.outcome),
        "agent": [agent],
        "source": {"observer": {"display": "capnote"}},
    }
    if subtype is not None:
        event["subtype"] = [{"system": INTERACTION, "code": subtype}]
    if entry.outcome != "ok":
        event["outcomeDesc"] = entry.outcome
    entities: list[dict[str, Any]] = []
    if entry.note_key is not None:
        what: dict[str, Any] = (
            # A review visit record is no Procedure: it is named by capnote's review id.
            {"identifier": {"system": REVIEW_RECORD, "value": entry.note_key}}
            if entry.action.startswith("review-")
            else {"reference": f"Procedure/{entry.note_key}"}
        )
        note: dict[str, Any] = {"what": what}
        if entry.version is not None:
            note["detail"] = [{"type": "version", "valueString": str(entry.version)}]
        entities.append(note)
    if entry.detail:
        request: dict[str, Any] = {
            "type": {"system": ENTITY_TYPE, "code": "2", "display": "System Object"},
            "description": entry.detail,
        }
        _method, _sep, target = entry.detail.partition(" ")
        if entry.action in ("search", "audit-read") and "?" in target:
            query = target.split("?", 1)[1]
            request["query"] = base64.b64encode(query.encode()).decode()
        entities.append(request)
    if entities:
        event["entity"] = entities
    return event
