"""Who vouched for what: the Provenance resource each stored version carries in its Bundle.

FHIR R4 Provenance (https://hl7.org/fhir/R4/provenance.html): target (every resource of the
version), recorded (when capnote stored it), activity (v3-DataOperation CREATE, UPDATE or
DELETE), agents (the author who sent it; the attester who signed it) and the reason given
for an amendment or a void. Each version has a Provenance of its own, never updated, so the
receiving record keeps the whole chain of who did what.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any, Final

from capnote.fhir.codes import CANONICAL, coding, concept
from capnote.fhir.common import KeyMaker, when

# Extensible bindings in R4: Provenance.activity (ProvenanceActivityType, which includes
# v3-DataOperation) and Provenance.agent.type (ProvenanceParticipantType).
DATA_OPERATION: Final = "http://terminology.hl7.org/CodeSystem/v3-DataOperation"
PARTICIPANT: Final = "http://terminology.hl7.org/CodeSystem/provenance-participant-type"
TOKEN_SYSTEM: Final = f"{CANONICAL}/sid/token"

_ACTIVITY = {
    "create": ("CREATE", "create"),
    "amend": ("UPDATE", "revise"),
    "recount": ("UPDATE", "revise"),
    "reviewed": ("UPDATE", "revise"),
    "void": ("DELETE", "delete"),
}
_AGENT_TYPE = {
    "author": concept(coding(PARTICIPANT, "author", "Author")),
    "attester": concept(coding(PARTICIPANT, "attester", "Attester")),
}


@dataclass(frozen=True, slots=True)
class Actor:
    """A person or a system client, as a Provenance agent names it."""

    display: str
    # A person's staff identifier (system, value); None for a system client.
    staff: tuple[str, str] | None = None
    token_id: int | None = None

    def reference(self) -> dict[str, Any]:
        """An identifier reference: a Practitioner by staff identifier, else the client as
        a Device known by its capnote token id."""
        if self.staff is not None:
            system, value = self.staff
            return {
                "type": "Practitioner",
                "identifier": {"system": system, "value": value},
                "display": self.display,
            }
        ref: dict[str, Any] = {"type": "Device", "display": self.display}
        if self.token_id is not None:
            ref["identifier"] = {"system": TOKEN_SYSTEM, "value": str(self.token_id)}
        return ref


def provenance_entry(
    keys: KeyMaker,
    version: int,
    targets: list[str],
    action: str,
    recorded: datetime,
    author: Actor,
    attester: Actor | None,
    reason: str | None,
) -> tuple[dict[str, Any], str]:
    """The Bundle entry of one version's Provenance, and its role."""
    role = f"provenance-{version}"
    key = keys.key(role)
    code, word = _ACTIVITY[action]
    agents = [{"type": _AGENT_TYPE["author"], "who": author.reference()}]
    if attester is not None:
        agents.append({"type": _AGENT_TYPE["attester"], "who": attester.reference()})
    # R4 Provenance has no identifier to create it conditionally by, so it carries its
    # stable UUID as its id and is written by update as create (PUT Provenance/<id>, R4
    # http.html "Update as Create"): sending the version again writes nothing new.
    resource: dict[str, Any] = {
        "resourceType": "Provenance",
        "id": key,
        "target": [{"reference": url} for url in targets],
        "recorded": when(recorded),
        "activity": concept(coding(DATA_OPERATION, code, word)),
        "agent": agents,
    }
    if reason:
        resource["reason"] = [{"text": reason}]
    entry = {
        "fullUrl": f"urn:uuid:{key}",
        "resource": resource,
        "request": {"method": "PUT", "url": f"Provenance/{key}"},
    }
    return entry, role
