"""The last line of defence: an exception no handler took still gets an OperationOutcome.

Starlette answers an unhandled exception and then re-raises it, so the server logs the full
traceback with the exception's message, which may hold values from a request. This
middleware sits inside that layer, answers with an incident id, logs only the exception's
type and the route, and does not re-raise.
"""

from __future__ import annotations

import logging

import orjson
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from capnote.fhir.outcome import incident_outcome

log = logging.getLogger("capnote.api")


class Guard:
    """Catch what escaped every handler."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def tracked(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, tracked)
        except Exception as exc:  # every kind: this is the catch-all by design
            incident, body = incident_outcome()
            log.error(
                "incident %s: %s on %s %s",
                incident,
                type(exc).__name__,
                scope.get("method"),
                scope.get("path"),
            )
            if started:  # too late to answer; the connection is closed by the server
                return
            payload = orjson.dumps(body)
            await send(
                {
                    "type": "http.response.start",
                    "status": 500,
                    "headers": [
                        (b"content-type", b"application/fhir+json"),
                        (b"content-length", str(len(payload)).encode()),
                    ],
                }
            )
            await send({"type": "http.response.body", "body": payload})
