"""Security headers on every answer, as a plain ASGI middleware.

Starlette's function middleware (BaseHTTPMiddleware) runs the app in a task of its own and
copies the answer through a stream; that cost about a tenth of a millisecond per request,
here a dictionary merge on the response's start.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

SECURITY_HEADERS = (
    (b"x-content-type-options", b"nosniff"),
    (b"content-security-policy", b"default-src 'self'; frame-ancestors 'none'"),
    (b"referrer-policy", b"no-referrer"),
    (b"cache-control", b"no-store"),
)


class SecurityHeaders:
    """Add each header the answer does not already set."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", ()))
                present = {name.lower() for name, _value in headers}
                headers += [(n, v) for n, v in SECURITY_HEADERS if n not in present]
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, with_headers)
