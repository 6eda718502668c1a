"""Note routes: parse, call capnote.notes, map, return."""

from __future__ import annotations

from datetime import date
from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Depends, Header, Path, Query, Request
from fastapi.responses import Response
from pydantic import AwareDatetime

from capnote.api.answers import (
    CheckAnswer,
    DeliveryAnswer,
    NoteAnswer,
    NoteListAnswer,
    VersionsAnswer,
    WorklistAnswer,
)
from capnote.api.auth import CHECK, READ, WRITE, allow
from capnote.api.deps import Notes
from capnote.api.docs import AMEND_BODY, CHECK_BODY, NOTE_BODY, VOID_BODY, responses
from capnote.api.media import JSON, fhir_response, http_date, json_body, json_response
from capnote.api.prefer import wanted_return
from capnote.errors import PreconditionRequiredError
from capnote.findings import refusal
from capnote.notes import Principal, StoredNote

router = APIRouter(prefix="/notes", tags=["notes"])


def _etag(stored: StoredNote) -> dict[str, str]:
    return {
        "ETag": f'W/"{stored.version}"',
        "Location": f"/notes/{stored.key}",
        "Last-Modified": http_date(stored.recorded_at),
    }


def _answer(stored: StoredNote, status: int = 200) -> Response:
    """A stored version as the answer, with its ETag, Location and Last-Modified."""
    return Response(stored.json(), status, _etag(stored), media_type=JSON)


def _written(request: Request, stored: StoredNote, status: int = 200) -> Response:
    """The answer to a create or an amend, shaped by Prefer: return= (FHIR R4 http 3.1.0.6):
    minimal gives no body, OperationOutcome the version's findings as one, representation
    (and no preference, the default) the whole stored version."""
    wanted = wanted_return(request)
    if wanted is None:
        return _answer(stored, status)
    headers = {**_etag(stored), "Preference-Applied": f"return={wanted}"}
    if wanted == "minimal":
        return Response(None, status, headers)
    if wanted == "OperationOutcome":
        return fhir_response(stored.result["outcome"], status, headers)
    return Response(stored.json(), status, headers, media_type=JSON)


def if_match_version(value: str | None) -> int:
    """The version in If-Match (W/"3", "3" or 3); required on every change (428)."""
    if value is None:
        raise PreconditionRequiredError(
            "If-Match is required: read the note, then send its ETag as If-Match"
        )
    text = value.strip().removeprefix("W/").strip('"')
    # ASCII digits only: str.isdigit() also takes "²", which int() then refuses; nine digits
    # at most, so the number fits every engine's version column.
    if not (text.isascii() and text.isdigit() and len(text) <= 9):
        raise refusal(
            "if-match-invalid",
            "If-Match",
            "If-Match must name a version",
            'If-Match: W/"<version>"',
            value=value[:40],
            issue_type="value",
        )
    return int(text)


@router.post(
    "",
    status_code=201,
    openapi_extra=NOTE_BODY,
    responses=responses(200, 201, 409, 422, model=NoteAnswer),
)
async def submit_note(
    request: Request, notes: Notes, who: Annotated[Principal, Depends(allow(*WRITE))]
) -> Response:
    """Check, derive, schedule, store and emit one note (resending the same note is safe)."""
    # No thread hop: the work is computation under the GIL, which a worker thread would
    # only slow down, and the store's calls never block the loop (capnote.store.base).
    body = await json_body(request)
    created, stored = await notes.submit(body, who)
    return _written(request, stored, 201 if created else 200)


@router.post("/check", openapi_extra=CHECK_BODY, responses=responses(200, model=CheckAnswer))
async def check_note(
    request: Request, notes: Notes, _who: Annotated[Principal, Depends(allow(*CHECK))]
) -> Response:
    """Everything POST /notes would produce (findings, derived values, due items, Bundle),
    stored nowhere; a note with errors still answers 200, with accepted false."""
    body = await json_body(request)
    if not body.lstrip().startswith(b"{"):
        # Anything but a JSON object is no note at all: refused, not reported on.
        raise refusal(
            "wrong-type",
            "",
            "the body must be a JSON object",
            "POST /notes/check takes a note (a JSON object)",
            issue_type="structure",
        )
    return json_response(await notes.check(body))


@router.get("", responses=responses(200, 422, model=NoteListAnswer))
async def list_notes(
    notes: Notes,
    _who: Annotated[Principal, Depends(allow(*READ))],
    patient: Annotated[str, Query(description="system|value", pattern=r"^[^|]+\|[^|]+$")],
    eye: Annotated[str | None, Query(pattern="^(right|left)$")] = None,
    from_: Annotated[AwareDatetime | None, Query(alias="from")] = None,
    to: AwareDatetime | None = None,
    page: Annotated[int, Query(ge=1, le=100_000)] = 1,
    count: Annotated[int, Query(ge=1, le=200)] = 50,
) -> Response:
    """The latest version of each note of a patient, in session order, paged."""
    system, value = patient.split("|", 1)
    total, rows = await notes.search((system, value), eye, from_, to, (page - 1) * count, count)
    body: dict[str, Any] = {
        "total": total,
        "page": page,
        "count": count,
        "notes": [orjson.Fragment(r.json()) for r in rows],
    }
    return json_response(body)


@router.get("/worklist", responses=responses(200, 422, model=WorklistAnswer))
async def worklist(
    notes: Notes,
    who: Annotated[Principal, Depends(allow(*WRITE))],
    day: Annotated[date | None, Query(description="a clinic day; today by default")] = None,
) -> Response:
    """The notes of one clinic day and the drafts this token last saved (the form opens on
    it)."""
    return json_response(await notes.worklist(day, who))


@router.get("/{note_id}", responses=responses(200, 404, model=NoteAnswer))
async def read_note(
    notes: Notes, note_id: str, _who: Annotated[Principal, Depends(allow(*READ))]
) -> Response:
    """The latest version of a note."""
    return _answer(await notes.get(note_id))


@router.get("/{note_id}/versions", responses=responses(200, 404, model=VersionsAnswer))
async def list_versions(
    notes: Notes, note_id: str, _who: Annotated[Principal, Depends(allow(*READ))]
) -> Response:
    """Every version of a note, oldest first."""
    versions = await notes.versions(note_id)
    return json_response({"id": note_id, "versions": versions})


@router.get("/{note_id}/versions/{version}", responses=responses(200, 404, model=NoteAnswer))
async def read_version(
    notes: Notes,
    note_id: str,
    version: Annotated[int, Path(ge=1, le=2**31 - 1)],
    _who: Annotated[Principal, Depends(allow(*READ))],
) -> Response:
    """One version of a note."""
    return _answer(await notes.get(note_id, version))


@router.get("/{note_id}/delivery", responses=responses(200, 404, model=DeliveryAnswer))
async def delivery_state(
    notes: Notes, note_id: str, _who: Annotated[Principal, Depends(allow(*READ))]
) -> Response:
    """Where each version's Bundle stands on its way to the hospital's FHIR server."""
    return json_response(await notes.delivery(note_id))


async def _change(
    request: Request,
    notes: Notes,
    action: str,
    note_id: str,
    who: Principal,
    if_match: str | None,
) -> Response:
    """An amend or a void: read the body, call the service, answer."""
    body = await json_body(request)
    if action == "amend":
        return _written(request, await notes.amend(note_id, body, who, if_match_version(if_match)))
    return _answer(await notes.void(note_id, body, who, if_match_version(if_match)))


@router.put(
    "/{note_id}",
    openapi_extra=AMEND_BODY,
    responses=responses(200, 404, 409, 412, 422, 428, model=NoteAnswer),
)
async def amend_note(
    request: Request,
    notes: Notes,
    note_id: str,
    who: Annotated[Principal, Depends(allow(*WRITE))],
    if_match: Annotated[str | None, Header()] = None,
) -> Response:
    """Store an amended version: {"reason": ..., "note": {...}}; a final note needs a reason."""
    return await _change(request, notes, "amend", note_id, who, if_match)


@router.post(
    "/{note_id}/void",
    openapi_extra=VOID_BODY,
    responses=responses(200, 404, 412, 422, 428, model=NoteAnswer),
)
async def void_note(
    request: Request,
    notes: Notes,
    note_id: str,
    who: Annotated[Principal, Depends(allow(*WRITE))],
    if_match: Annotated[str | None, Header()] = None,
) -> Response:
    """Mark a note entered-in-error, with a reason; its resources are emitted so."""
    return await _change(request, notes, "void", note_id, who, if_match)
