"""The audit trail, for the auditor role only."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query
from fastapi.responses import Response

from capnote.api.answers import AuditAnswer
from capnote.api.auth import AUDIT, allow
from capnote.api.deps import Audit
from capnote.api.docs import responses
from capnote.api.media import json_response
from capnote.notes import Principal

router = APIRouter(tags=["audit"])


@router.get("/audit", responses=responses(200, model=AuditAnswer))
async def audit_trail(
    trail: Audit,
    _who: Annotated[Principal, Depends(allow(*AUDIT))],
    note: Annotated[str | None, Query(max_length=36)] = None,
    page: Annotated[int, Query(ge=1, le=100_000)] = 1,
    count: Annotated[int, Query(ge=1, le=500)] = 100,
) -> Response:
    """Who did what to which note, newest first."""
    entries = await trail.entries(note, page, count)
    return json_response({"page": page, "count": count, "entries": entries})
