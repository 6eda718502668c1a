"""The one place where every error becomes an HTTP answer with an OperationOutcome."""

from __future__ import annotations

import logging
from collections.abc import Iterable, Iterator, Mapping
from typing import cast

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from pydantic_core import ErrorDetails
from sqlalchemy.exc import DataError, InterfaceError, OperationalError
from starlette.exceptions import HTTPException
from starlette.requests import ClientDisconnect
from starlette.routing import BaseRoute, Match

from capnote.api.guard import incident
from capnote.api.media import FHIR_JSON, fhir_response
from capnote.errors import CapnoteError, PreconditionError, UnavailableError
from capnote.fhir.outcome import error_outcome, message_outcome, outcome
from capnote.findings import unstorable
from capnote.rules.contract import finding_from_error

log = logging.getLogger("capnote.api")
_PLACES = ("body", "query", "path", "header")
_HTTP_ISSUE = {
    404: "not-found",
    405: "not-supported",
    406: "not-supported",
    401: "login",
    403: "forbidden",
    413: "too-costly",
    415: "not-supported",
}


def outcome_response(
    status: int, body: Mapping[str, object], headers: dict[str, str] | None = None
) -> Response:
    """An OperationOutcome answer."""
    return fhir_response(body, status, headers)


async def _capnote_error(_request: Request, exc: Exception) -> Response:
    assert isinstance(exc, CapnoteError)
    headers: dict[str, str] = {}
    if isinstance(exc, UnavailableError):
        headers["Retry-After"] = "5"
    if exc.http_status == 401:
        headers["WWW-Authenticate"] = 'Bearer realm="capnote"'
    if isinstance(exc, PreconditionError):
        headers["Cache-Control"] = "no-store"
    return outcome_response(exc.http_status, error_outcome(exc), headers)


async def _validation_error(_request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestValidationError)
    findings = [
        finding_from_error(
            # The parameter's own name is the location a caller knows, not "query".
            cast("ErrorDetails", {**e, "loc": tuple(p for p in e["loc"] if p not in _PLACES)}),
            code="request-invalid",
            rule="the request's parameters",
        )
        for e in exc.errors()
    ]
    return outcome_response(422, outcome(findings))


def _leaves(routes: Iterable[BaseRoute]) -> Iterator[BaseRoute]:
    """Every route, those of included routers too: FastAPI keeps an included router as one
    entry of app.routes, whose own routes carry the full path (capnote includes routers
    without a prefix), so a match against the app's entries alone names no methods."""
    for route in routes:
        inner = getattr(route, "original_router", None)
        if inner is not None:
            yield from _leaves(inner.routes)
        else:
            yield route


def _allowed_methods(request: Request) -> str:
    """Every method some route offers at this path (Starlette names only the first route's)."""
    methods: set[str] = set()
    for route in _leaves(request.app.routes):
        match, _ = route.matches({**request.scope, "method": "GET"})
        if match != Match.NONE:
            methods |= set(getattr(route, "methods", None) or ())
    if "GET" in methods:  # capnote.api.head answers HEAD wherever GET is served
        methods.add("HEAD")
    return ", ".join(sorted(methods))


async def _http_error(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, HTTPException)
    body = message_outcome("error", _HTTP_ISSUE.get(exc.status_code, "processing"), str(exc.detail))
    headers = dict(exc.headers or {})
    if exc.status_code == 405:
        headers["Allow"] = _allowed_methods(request)
    return outcome_response(exc.status_code, body, headers)


async def _unexpected(request: Request, exc: Exception) -> Response:
    # Only what escapes capnote.api.guard.Guard lands here (Starlette's outermost layer,
    # which re-raises after answering); both answer through the one incident().
    return outcome_response(500, incident(exc, request.method, request.url.path))


async def _database_error(request: Request, exc: Exception) -> Response:
    """A database that is down, restarting or locked: 503 with Retry-After, never 500."""
    log.warning(
        "database unavailable (%s) on %s %s", type(exc).__name__, request.method, request.url.path
    )
    return await _capnote_error(
        request,
        UnavailableError("the database is not reachable right now; retry after a few seconds"),
    )


async def _data_error(request: Request, exc: Exception) -> Response:
    """A parameter the database cannot hold (a NUL byte, say): the caller's error, 422."""
    log.info(
        "refused parameter (%s) on %s %s", type(exc).__name__, request.method, request.url.path
    )
    return outcome_response(422, error_outcome(unstorable()))


async def _client_gone(request: Request, _exc: Exception) -> Response:
    """The client closed the connection while its body was still coming: nobody is there
    to answer, and nothing went wrong here (an integration engine timing out, a load
    generator stopping). Noted at debug level, not as an incident."""
    log.debug("client went away during %s %s", request.method, request.url.path)
    return Response(status_code=400)


def install(app: FastAPI) -> None:
    """Register every handler."""
    app.add_exception_handler(ClientDisconnect, _client_gone)
    app.add_exception_handler(DataError, _data_error)
    app.add_exception_handler(OperationalError, _database_error)
    app.add_exception_handler(InterfaceError, _database_error)
    app.add_exception_handler(CapnoteError, _capnote_error)
    app.add_exception_handler(RequestValidationError, _validation_error)
    app.add_exception_handler(HTTPException, _http_error)
    app.add_exception_handler(Exception, _unexpected)


__all__ = ["FHIR_JSON", "install", "outcome_response"]
