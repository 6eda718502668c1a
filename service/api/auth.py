"""Bearer tokens and roles: one dependency per permission, checked before any work."""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from enum import StrEnum

from fastapi import Request

from service.errors import AuthenticationError, ForbiddenError
from service.notes import Principal
from service.store.ledger import Ledger
from service.store.repository import hash_token


class Role(StrEnum):
    """Who may do what."""

    SUBMITTER = "submitter"  # the EHR integration: create, amend, void, read
    CLINICIAN = "clinician"  # the form: create, amend, void, check, read
    ANALYST = "analyst"  # check and validate, read
    AUDITOR = "auditor"  # read, audit trail


WRITE = (Role.SUBMITTER, Role.CLINICIAN)
CHECK = (Role.SUBMITTER, Role.CLINICIAN, Role.ANALYST)
READ = (Role.SUBMITTER, Role.CLINICIAN, Role.ANALYST, Role.AUDITOR)
AUDIT = (Role.AUDITOR,)


def allow(*roles: Role) -> Callable[[Request], Awaitable[Principal]]:
    """A dependency that answers 401 without a live token and 403 for another role.

    The token is looked up on every request (revoking one takes effect at once) through the
    ledger: on SQLite a few microseconds on the event loop, on PostgreSQL one round trip.
    """
    allowed = {r.value for r in roles}

    async def principal(request: Request) -> Principal:
        header = request.headers.get("authorization", "")
        scheme, _, token = header.partition(" ")
        if scheme.lower() != "bearer" or not token.strip():
            raise AuthenticationError("a bearer token is required")
        ledger: Ledger = request.app.state.ledger
        row = await ledger.token(hash_token(token.strip()))
        if row is None:
            raise AuthenticationError("the token is unknown or revoked")
        if row.role not in allowed:
            raise ForbiddenError(f"the role {row.role} may not do this")
        client = request.client.host if request.client else None
        return Principal(label=row.label, role=row.role, remote=client)

    return principal
