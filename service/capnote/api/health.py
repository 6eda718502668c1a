"""Liveness and readiness: no token, no patient data."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import Response

from capnote.api.answers import StatusAnswer
from capnote.api.deps import Notes
from capnote.api.docs import responses
from capnote.api.media import json_response

router = APIRouter(tags=["health"])


@router.get("/healthz", responses=responses(200, model=StatusAnswer))
async def healthz() -> Response:
    """The process is up."""
    return json_response({"status": "ok"})


@router.get("/readyz", responses=responses(200, 503, model=StatusAnswer))
async def readyz(notes: Notes) -> Response:
    """The database answers, on the connections that serve requests (503 with an
    OperationOutcome when it does not)."""
    await notes.ready()
    return json_response({"status": "ready"})
