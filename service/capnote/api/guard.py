"""The last line of defence: an exception no handler took still gets an OperationOutcome.

Starlette answers an unhandled exception and then re-raises it, so the server logs the full
traceback with the exception's message, which may hold values from a request. This
middleware sits inside that layer, answers with an incident id, logs only the exception's
type and the route, and does not re-raise.
"""

from __future__ import annotations

import logging
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from capnote.api.media import send_fhir
from capnote.fhir.outcome import incident_outcome

log = logging.getLogger("capnote.api")


def incident(exc: BaseException, method: str | None, path: str | None) -> dict[str, Any]:
    """The one answer to the unexpected: log the incident id, the exception's type and the
    route (a payload or its values never reach the log) and return the generic outcome."""
    number, body = incident_outcome()
    log.error("incident %s: %s on %s %s", number, type(exc).__name__, method, path)
    return body


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
            body = incident(exc, scope.get("method"), scope.get("path"))
            if started:  # too late to answer; the connection is closed by the server
                return
            await send_fhir(send, 500, body)
