"""The audit trail, for the auditor role only."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import Response
from sqlmodel import Session

from service.api.auth import AUDIT, allow
from service.api.docs import responses
from service.api.media import json_response
from service.notes import Principal
from service.store import repository as repo

router = APIRouter(tags=["audit"])


@router.get("/audit", responses=responses(200))
def audit_trail(
    request: Request,
    _who: Annotated[Principal, Depends(allow(*AUDIT))],
    note: Annotated[str | None, Query(max_length=36)] = None,
    page: Annotated[int, Query(ge=1, le=100_000)] = 1,
    count: Annotated[int, Query(ge=1, le=500)] = 100,
) -> Response:
    """Who did what to which note, newest first."""
    with Session(request.app.state.engine) as session:
        rows = repo.audit_entries(session, note, (page - 1) * count, count)
        entries = [
            {
                "at": repo.from_db(r.at).isoformat(),
                "actor": r.actor,
                "role": r.role,
                "action": r.action,
                "note": r.note_key,
                "version": r.version,
                "remote": r.remote,
                "outcome": r.outcome,
            }
            for r in rows
        ]
    return json_response({"page": page, "count": count, "entries": entries})
