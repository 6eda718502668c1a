"""A body-size limit for every request, enforced while the body streams in."""

from __future__ import annotations

from typing import Any

import orjson
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from capnote.errors import PayloadError

_TOO_LARGE = {
    "resourceType": "OperationOutcome",
    "issue": [
        {"severity": "error", "code": "too-costly", "diagnostics": "the request body is too large"}
    ],
}


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
            await _refuse(send)
            return
        seen = 0

        async def counted() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > self.max_bytes:
                    raise PayloadError("the request body is too large", 413, "too-costly")
            return message

        await self.app(scope, counted, send)


async def _refuse(send: Send) -> None:
    body: Any = orjson.dumps(_TOO_LARGE)
    await send(
        {
            "type": "http.response.start",
            "status": 413,
            "headers": [
                (b"content-type", b"application/fhir+json"),
                (b"content-length", str(len(body)).encode()),
                (b"connection", b"close"),
            ],
        }
    )
    await send({"type": "http.response.body", "body": body})
