"""The Host a request names, as a plain ASGI middleware: refused unless served, and replaced
by the configured public base URL, so that no link capnote writes follows a client's Host.

A client that sends `Host: attacker.example` and pages by the links it gets back would send
its token there if the links were built from that header (found by the security tester).
With CAPNOTE_PUBLIC_BASE_URL set, the scope's scheme, server and Host header become the
public ones before the application sees them: request.base_url, and so every link, is the
public address whatever the client sent.
"""

from __future__ import annotations

from urllib.parse import urlsplit

from starlette.types import ASGIApp, Receive, Scope, Send

from capnote.api.media import send_fhir
from capnote.fhir.outcome import message_outcome


def _hostname(host: str) -> str:
    """The host name of a Host header value, without its port ([::1]:8080 -> ::1)."""
    host = host.strip().lower()
    if host.startswith("["):
        return host[1:].split("]", 1)[0]
    return host.rsplit(":", 1)[0] if host.count(":") == 1 else host


class PublicHost:
    """Refuse a Host outside the served list (400); rewrite to the public base URL."""

    def __init__(self, app: ASGIApp, public_base_url: str | None, allowed: list[str]) -> None:
        self.app = app
        self.any = "*" in allowed
        self.allowed = {_hostname(h) for h in allowed if h != "*"}
        self.public: tuple[str, str, int] | None = None
        if public_base_url:
            parts = urlsplit(public_base_url)
            host = parts.hostname or ""
            port = parts.port or (443 if parts.scheme == "https" else 80)
            self.public = (parts.scheme, parts.netloc, port)
            self.allowed.add(host.lower())

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = scope.get("headers", [])
        host = next((v.decode("latin-1") for k, v in headers if k == b"host"), "")
        if not self.any and _hostname(host) not in self.allowed:
            body = message_outcome(
                "error",
                "security",
                "the Host header names a host this server does not serve "
                "(CAPNOTE_ALLOWED_HOSTS, CAPNOTE_PUBLIC_BASE_URL)",
                "host-refused",
            )
            await send_fhir(send, 400, body)
            return
        if self.public is not None:
            scheme, netloc, port = self.public
            rest = [(k, v) for k, v in headers if k != b"host"]
            scope = {
                **scope,
                "scheme": scheme,
                "server": (netloc.rsplit(":", 1)[0], port),
                "headers": [(b"host", netloc.encode("latin-1")), *rest],
            }
        await self.app(scope, receive, send)
