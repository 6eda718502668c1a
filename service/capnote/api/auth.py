"""Bearer tokens and roles: one dependency per permission, checked before any work."""

from __future__ import annotations

from collections.abc import Awaitable, Callable
from enum import StrEnum

from fastapi import Request

from capnote.api.deps import Tokens
from capnote.notes import Principal


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


def allow(*roles: Role) -> Callable[..., Awaitable[Principal]]:
    """A dependency that answers 401 without a live token and 403 for another role (the
    token is looked up on every request: capnote.access)."""
    allowed = frozenset(r.value for r in roles)

    async def principal(request: Request, tokens: Tokens) -> Principal:
        client = request.client.host if request.client else None
        who = await tokens.principal(request.headers.get("authorization", ""), allowed, client)
        request.state.principal = who  # for the audit trail (capnote.api.access_audit)
        return who

    return principal
