"""HEAD answered as GET without a body (RFC 9110 9.3.2), for every GET route, as a plain
ASGI middleware: the routes and the OpenAPI document name GET only, and the headers
(Content-Length, ETag, Last-Modified) are the ones GET would send."""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send


class HeadAsGet:
    """Run a HEAD request as GET and send its headers with an empty body."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] != "HEAD":
            await self.app(scope, receive, send)
            return

        async def headers_only(message: Message) -> None:
            if message["type"] == "http.response.body":
                if message.get("more_body", False):
                    return  # the rest of a streamed body: nothing is sent for HEAD
                message = {"type": "http.response.body", "body": b"", "more_body": False}
            await send(message)

        await self.app({**scope, "method": "GET"}, receive, headers_only)
