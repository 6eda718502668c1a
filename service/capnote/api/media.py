"""Media types, JSON bodies in and out."""

from __future__ import annotations

from datetime import UTC, datetime
from email.utils import format_datetime
from typing import Any

import orjson
from fastapi import Request
from fastapi.responses import Response
from starlette.types import Send

from capnote.errors import PayloadError
from capnote.jsonsafety import check_json

FHIR_JSON = "application/fhir+json"
JSON = "application/json"
_ACCEPTED = (JSON, FHIR_JSON)


def http_date(moment: datetime | str) -> str:
    """A time as an HTTP-date (RFC 9110 5.6.7), for Last-Modified: whole seconds, GMT."""
    if isinstance(moment, str):
        moment = datetime.fromisoformat(moment)
    return format_datetime(moment.astimezone(UTC), usegmt=True)


def fhir_response(body: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    """A FHIR resource answer."""
    return Response(orjson.dumps(body), status, headers, media_type=f"{FHIR_JSON}; charset=utf-8")


def json_response(body: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    """A plain JSON answer."""
    return Response(orjson.dumps(body), status, headers, media_type=JSON)


async def send_fhir(
    send: Send, status: int, body: Any, extra: tuple[tuple[bytes, bytes], ...] = ()
) -> None:
    """A FHIR answer sent straight on an ASGI channel, for the middleware that answers
    before (or instead of) the application."""
    payload = orjson.dumps(body)
    headers = [
        (b"content-type", f"{FHIR_JSON}; charset=utf-8".encode()),
        (b"content-length", str(len(payload)).encode()),
        *extra,
    ]
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": payload})


async def json_body(request: Request) -> bytes:
    """The raw body of a JSON request; other media types are refused with 415."""
    kind = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if kind not in _ACCEPTED:
        raise PayloadError(
            f"the body must be {JSON} or {FHIR_JSON}, not {kind or 'missing'}", 415, "not-supported"
        )
    raw = await request.body()
    check_json(raw)
    return raw
