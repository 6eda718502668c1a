"""Liveness and readiness: no token, no patient data."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import Response
from starlette.concurrency import run_in_threadpool

from service.api.docs import responses
from service.api.media import json_response
from service.store.database import ping

router = APIRouter(tags=["health"])


@router.get("/healthz", responses=responses(200))
def healthz() -> Response:
    """The process is up."""
    return json_response({"status": "ok"})


@router.get("/readyz", responses=responses(200, 503))
async def readyz(request: Request) -> Response:
    """The database answers (503 with an OperationOutcome when it does not)."""
    await run_in_threadpool(ping, request.app.state.engine)
    return json_response({"status": "ready"})
