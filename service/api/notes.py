"""Note routes: parse, call service.notes, map, return."""

from __future__ import annotations

from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Depends, Header, Path, Query, Request
from fastapi.responses import Response
from pydantic import AwareDatetime
from sqlmodel import Session

from service.api.auth import CHECK, READ, WRITE, allow
from service.api.docs import AMEND_BODY, CHECK_BODY, NOTE_BODY, VOID_BODY, responses
from service.api.media import JSON, json_body, json_response
from service.delivery import outcome_text
from service.errors import InputError, NotFoundError
from service.findings import Finding, Severity
from service.note_input import known_key
from service.notes import NoteService, Principal, StoredNote
from service.store import outbox
from service.store import repository as repo

router = APIRouter(prefix="/notes", tags=["notes"])


def _service(request: Request) -> NoteService:
    service: NoteService = request.app.state.notes
    return service


def _etag(stored: StoredNote) -> dict[str, str]:
    return {"ETag": f'W/"{stored.version}"', "Location": f"/notes/{stored.key}"}


def _answer(stored: StoredNote, status: int = 200) -> Response:
    """A stored version as the answer, with its ETag and Location."""
    return Response(stored.json(), status, _etag(stored), media_type=JSON)


def _if_match(value: str | None) -> int | None:
    """The version in If-Match (W/"3", "3" or 3); None when absent."""
    if value is None:
        return None
    text = value.strip().removeprefix("W/").strip('"')
    if not text.isdigit():
        raise InputError(
            "If-Match is not a version",
            [
                Finding(
                    Severity.ERROR,
                    "if-match-invalid",
                    "If-Match",
                    "If-Match must name a version",
                    'If-Match: W/"<version>"',
                    value=value[:40],
                    issue_type="value",
                )
            ],
        )
    return int(text)


@router.post("", status_code=201, openapi_extra=NOTE_BODY, responses=responses(200, 201, 409, 422))
async def submit_note(
    request: Request, who: Annotated[Principal, Depends(allow(*WRITE))]
) -> Response:
    """Check, derive, schedule, store and emit one note (resending the same note is safe)."""
    # No thread hop: the work is computation under the GIL, which a worker thread would
    # only slow down, and the store's calls never block the loop (service.store.ledger).
    body = await json_body(request)
    created, stored = await _service(request).submit(body, who)
    return _answer(stored, 201 if created else 200)


@router.post("/check", openapi_extra=CHECK_BODY, responses=responses(200))
async def check_note(
    request: Request, _who: Annotated[Principal, Depends(allow(*CHECK))]
) -> Response:
    """Everything POST /notes would produce (findings, derived values, due items, Bundle),
    stored nowhere; a note with errors still answers 200, with accepted false."""
    body = await json_body(request)
    if not body.lstrip().startswith(b"{"):
        # Anything but a JSON object is no note at all: refused, not reported on.
        raise InputError(
            "the body must be a JSON object",
            [
                Finding(
                    Severity.ERROR,
                    "wrong-type",
                    "",
                    "the body must be a JSON object",
                    "POST /notes/check takes a note (a JSON object)",
                    issue_type="structure",
                )
            ],
        )
    return json_response(await _service(request).check(body))


@router.get("", responses=responses(200, 422))
def list_notes(
    request: Request,
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
    total, rows = _service(request).search(
        (system, value), eye, from_, to, (page - 1) * count, count
    )
    body: dict[str, Any] = {
        "total": total,
        "page": page,
        "count": count,
        "notes": [orjson.Fragment(r.json()) for r in rows],
    }
    return json_response(body)


@router.get("/{note_id}", responses=responses(200, 404))
async def read_note(
    request: Request, note_id: str, _who: Annotated[Principal, Depends(allow(*READ))]
) -> Response:
    """The latest version of a note."""
    return _answer(await _service(request).get(note_id))


@router.get("/{note_id}/versions", responses=responses(200, 404))
async def list_versions(
    request: Request, note_id: str, _who: Annotated[Principal, Depends(allow(*READ))]
) -> Response:
    """Every version of a note, oldest first."""
    versions = await _service(request).versions(note_id)
    return json_response({"id": note_id, "versions": versions})


@router.get("/{note_id}/versions/{version}", responses=responses(200, 404))
async def read_version(
    request: Request,
    note_id: str,
    version: Annotated[int, Path(ge=1, le=2**31 - 1)],
    _who: Annotated[Principal, Depends(allow(*READ))],
) -> Response:
    """One version of a note."""
    return _answer(await _service(request).get(note_id, version))


@router.get("/{note_id}/delivery", responses=responses(200, 404))
def delivery_state(
    request: Request, note_id: str, _who: Annotated[Principal, Depends(allow(*READ))]
) -> Response:
    """Where each version's Bundle stands on its way to the hospital's FHIR server."""
    key = known_key(note_id)
    with Session(request.app.state.engine) as session:
        entries = outbox.for_note(session, key)
        if not entries and not repo.note_exists(session, key):
            raise NotFoundError("no note with this id")
        body = [
            {
                "version": e.version,
                "state": e.state,
                "attempts": e.attempts,
                "last_status": e.last_status,
                "receiver_answer": outcome_text(e.last_error),
                "next_attempt_at": repo.from_db(e.next_attempt_at).isoformat(),
                "delivered_at": repo.from_db(e.delivered_at).isoformat()
                if e.delivered_at
                else None,
            }
            for e in entries
        ]
    return json_response(
        {"id": key, "forwarding": request.app.state.notes.forward, "deliveries": body}
    )


async def _change(
    request: Request, action: str, note_id: str, who: Principal, if_match: str | None
) -> Response:
    """An amend or a void: read the body, call the service off the event loop, answer."""
    body = await json_body(request)
    service = _service(request)
    change = service.amend if action == "amend" else service.void
    return _answer(await change(note_id, body, who, _if_match(if_match)))


@router.put("/{note_id}", openapi_extra=AMEND_BODY, responses=responses(200, 404, 409, 412, 422))
async def amend_note(
    request: Request,
    note_id: str,
    who: Annotated[Principal, Depends(allow(*WRITE))],
    if_match: Annotated[str | None, Header()] = None,
) -> Response:
    """Store an amended version: {"reason": ..., "note": {...}}; a final note needs a reason."""
    return await _change(request, "amend", note_id, who, if_match)


@router.post("/{note_id}/void", openapi_extra=VOID_BODY, responses=responses(200, 404, 412, 422))
async def void_note(
    request: Request,
    note_id: str,
    who: Annotated[Principal, Depends(allow(*WRITE))],
    if_match: Annotated[str | None, Header()] = None,
) -> Response:
    """Mark a note entered-in-error, with a reason; its resources are emitted so."""
    return await _change(request, "void", note_id, who, if_match)
