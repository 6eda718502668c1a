"""A body-size limit for every request, enforced while the body streams in."""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from capnote.api.media import send_fhir
from capnote.errors import PayloadError
from capnote.fhir.outcome import error_outcome


def too_large(max_bytes: int) -> PayloadError:
    """The one refusal of an oversized body, whether Content-Length or the stream told; it
    says the limit, so a sender knows what to split or raise (CAPNOTE_MAX_BODY_BYTES)."""
    return PayloadError(
        f"the request body is too large: the limit is {max_bytes} bytes (CAPNOTE_MAX_BODY_BYTES)",
        413,
        "too-costly",
    )


class BodyLimit:
    """Refuse bodies over max_bytes: at once by Content-Length, else as they stream."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = dict(scope.get("headers", [])).get(b"content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > self.max_bytes):
            # The body is never read, so the connection cannot be reused.
            await send_fhir(
                send, 413, error_outcome(too_large(self.max_bytes)), ((b"connection", b"close"),)
            )
            return
        seen = 0

        async def counted() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > self.max_bytes:
                    raise too_large(self.max_bytes)
            return message

        await self.app(scope, counted, send)
