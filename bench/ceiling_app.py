"""The ceiling: a bare FastAPI route that answers with the raw request body.

Served by uvicorn exactly as capnote is (same server, workers and logging), so that the
ratio capnote / ceiling is the share of the framework's best that capnote's own work leaves.
"""

from __future__ import annotations

from fastapi import FastAPI, Request
from fastapi.responses import Response


def create() -> FastAPI:
    """The app factory uvicorn calls."""
    app = FastAPI(openapi_url=None, docs_url=None, redoc_url=None)

    @app.post("/echo")
    async def echo(request: Request) -> Response:
        return Response(await request.body(), media_type="application/json")

    return app
