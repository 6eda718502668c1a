"""The ceiling: capnote's own app with one more route, a bare one that answers with the raw
request body.

It is the same app as capnote's (same middleware: the body limit, the last-resort guard,
the security headers), served by uvicorn exactly as capnote is, so that the ratio
capnote / ceiling is the share of the framework's best that capnote's own work leaves.
"""

from __future__ import annotations

from fastapi import FastAPI, Request
from fastapi.responses import Response

from capnote.app import app_from_environment


def create() -> FastAPI:
    """The app factory uvicorn calls (settings from CAPNOTE_ variables, as capnote's)."""
    app = app_from_environment()

    @app.post("/bench/echo", include_in_schema=False)
    async def echo(request: Request) -> Response:
        return Response(await request.body(), media_type="application/json")

    return app
