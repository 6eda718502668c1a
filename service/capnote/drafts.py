"""Drafts kept as typed: a note still being written, stored before it passes the contract.

A draft that breaks the contract or a blocking rule is kept as the JSON it was sent as, with
its findings, under status "partial" in the store (the API shows it as a draft with
``accepted: false`` and no Bundle). Nothing is emitted for it: no FHIR resources, no search
rows, no outbox entry, and it counts in no eye's totals, because the hospital record must
never hold a half-written note. Only what identifies it is required (DraftIdentity). Once a
version passes the contract it is stored as every other version is, and from then on the
note cannot go back to being kept as typed (its resources are in the record already).

Pure functions: NoteService does the reading and writing around them.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Annotated, Literal

import orjson
from pydantic import AwareDatetime, ConfigDict, Field, ValidationError

from capnote.errors import InputError
from capnote.fhir.codes import CANONICAL
from capnote.findings import Finding
from capnote.note import Contract, Eye, Identifier
from capnote.note_input import check_match, problem
from capnote.rules.contract import finding_from_error

EARLIEST = datetime(1980, 1, 1, tzinfo=UTC)
LATEST = datetime(2200, 1, 1, tzinfo=UTC)

PARTIAL = "partial"
"""The store's status of a version kept as typed (the note's own status is "draft")."""

RULE = "a draft is saved once it names its note number, patient, eye and session start"


class DraftIdentity(Contract):
    """What a draft must have to be saved: which note, which patient, which eye, when."""

    # Everything else may be missing or wrong in a draft; it is checked, not required.
    model_config = ConfigDict(extra="ignore", frozen=True, strict=True)

    note_id: Identifier
    patient: Identifier
    eye: Eye
    # A kept draft is stored before the contract's date checks pass, so its start is
    # bounded here: no Nd:YAG capsulotomy was done before 1980 (from memory: the laser came
    # into use for it around then), and the stores cannot keep a year before 1000.
    started_at: Annotated[AwareDatetime, Field(ge=EARLIEST, lt=LATEST)]
    status: Literal["draft"]


@dataclass(frozen=True, slots=True)
class KeptDraft:
    """A draft to keep as typed: who it is about, its JSON as stored, and its findings."""

    identity: DraftIdentity
    note_json: str
    findings: list[Finding]


def kept_draft(payload: bytes, findings: list[Finding]) -> KeptDraft:
    """The draft to keep when a payload failed its checks (findings); InputError when it is
    not a draft, or when it lacks what identifies it (only those findings are given)."""
    try:
        data = orjson.loads(payload)
    except orjson.JSONDecodeError:
        raise InputError("the note has errors", findings) from None
    if not isinstance(data, dict) or data.get("status") != "draft":
        raise InputError("the note has errors", findings)
    try:
        identity = DraftIdentity.model_validate_json(payload)
    except ValidationError as exc:
        missing = [finding_from_error(e, rule=RULE) for e in exc.errors(include_url=False)]
        raise InputError(
            "the draft does not say which note, patient, eye and time", missing
        ) from None
    # Keys sorted: the same draft sent twice has the same text, so a resend is recognised.
    return KeptDraft(identity, orjson.dumps(data, option=orjson.OPT_SORT_KEYS).decode(), findings)


def identity_of(note_json: str) -> tuple[tuple[str, str], str]:
    """The patient and eye of a stored version (kept as typed or whole)."""
    kept = DraftIdentity.model_validate_json(
        orjson.dumps({**orjson.loads(note_json), "status": "draft"})
    )
    return (kept.patient.system, kept.patient.value), kept.eye


def amending_kept(
    *,
    latest_version: int,
    latest_hash: str,
    latest_identity: tuple[tuple[str, str], str],
    identity: tuple[tuple[str, str], str],
    content_hash: str,
    if_match: int,
) -> Literal["already-stored", "store"]:
    """Whether a new version of a draft kept as typed is stored: the same content again is a
    retry; If-Match must name the latest version; the patient and eye stay (as for every
    amendment: rules.lifecycle)."""
    if latest_hash == content_hash:
        return "already-stored"
    check_match(latest_version, if_match)
    (patient_before, eye_before), (patient_after, eye_after) = latest_identity, identity
    for field, before, after in (
        ("note.patient", patient_before, patient_after),
        ("note.eye", eye_before, eye_after),
    ):
        if before != after:
            raise problem(
                "identity-change",
                field,
                f"an amendment cannot change {field.removeprefix('note.')}",
                "void this note with a reason, then send a new note for the right patient and eye",
            )
    return "store"


_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, CANONICAL)


def draft_key(identity: DraftIdentity) -> str:
    """The note's id, as notes.note_key gives it for the whole note (a UUID 5 of the sender's
    note identifier: capnote.fhir.common.KeyMaker), so a draft keeps its id once whole."""
    name = f"{identity.note_id.system}|{identity.note_id.value}|procedure"
    return str(uuid.uuid5(_NAMESPACE, name))
