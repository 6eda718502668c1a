"""The audit trail of reads, searches and refusals, as a plain ASGI middleware.

It sees every answer's status, so a 401 or a 409 is recorded as such; the entry is written
after the answer is sent, so the caller does not wait for it. A failure to write it is
logged (without patient data) and never turns a sent answer into an error.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from datetime import datetime

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from capnote.access_log import audited
from capnote.notes import Principal
from capnote.store.base import AuditRow, Store

log = logging.getLogger("capnote.audit")


class AccessAudit:
    """Record each audited request (capnote.access_log) once its answer is sent."""

    def __init__(self, app: ASGIApp, store: Store, clock: Callable[[], datetime]) -> None:
        self.app = app
        self.store = store
        self.clock = clock

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        status = 500

        async def watched(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, watched)
        finally:
            await self._record(scope, status)

    async def _record(self, scope: Scope, status: int) -> None:
        query = scope.get("query_string", b"").decode("latin-1")
        entry = audited(scope["method"], scope["path"], query, status)
        if entry is None:
            return
        who = scope.get("state", {}).get("principal")
        client = scope.get("client")
        address = client[0] if client else None
        if isinstance(who, Principal):
            actor, role, token, remote = who.label, who.role, who.token_id, who.remote
        else:  # refused before a token was known (401)
            actor, role, token, remote = "(no valid token)", "-", None, address
        row = AuditRow(
            self.clock(), actor, role, entry.action, remote, token, entry.detail, entry.outcome
        )
        try:
            await self.store.record(row, entry.note_key, None)
        except Exception as exc:
            log.warning("audit entry not written: %s", type(exc).__name__)
