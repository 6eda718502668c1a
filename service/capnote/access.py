"""Who is asking: a bearer token looked up on every request (revoking one takes effect at
once); on SQLite a few microseconds on the event loop, on PostgreSQL one round trip."""

from __future__ import annotations

from collections.abc import Callable
from datetime import datetime, timedelta

from capnote.errors import AuthenticationError, ForbiddenError
from capnote.findings import refusal
from capnote.notes import Principal
from capnote.plain_text import printable
from capnote.store.base import Store
from capnote.tokens import REMOTE_MAX, hash_token

# How often a token's last-used time is written: often enough for `token list` to show
# whether a token is still in use, rarely enough that reads stay reads.
TOUCH_EVERY = timedelta(minutes=1)


class Access:
    """Tokens to principals."""

    def __init__(self, store: Store, clock: Callable[[], datetime]) -> None:
        self.store = store
        self.clock = clock

    async def principal(
        self, authorization: str, allowed: frozenset[str], remote: str | None
    ) -> Principal:
        """The principal of an Authorization header: 401 without a live bearer token, 403
        when its role is not among those allowed."""
        scheme, _, token = authorization.partition(" ")
        if scheme.lower() != "bearer" or not token.strip():
            raise AuthenticationError("a bearer token is required")
        row = await self.store.token(hash_token(token.strip()))
        if row is None:
            raise AuthenticationError("the token is unknown or revoked")
        now = self.clock()
        if row.expires_at is not None and row.expires_at <= now:
            raise AuthenticationError("the token has expired; ask the operator for a new one")
        if row.last_used_at is None or now - row.last_used_at >= TOUCH_EVERY:
            await self.store.token_used(row.id, now)
        who = Principal(
            label=row.label,
            role=row.role,
            remote=_checked_remote(remote),
            token_id=row.id,
            staff=row.staff,
        )
        if row.role not in allowed:
            raise ForbiddenError(f"the role {row.role} may not do this")
        return who


def _checked_remote(remote: str | None) -> str | None:
    """The client address as the audit trail keeps it; uvicorn takes it from
    X-Forwarded-For behind a trusted proxy, so it is the caller's text and is checked here,
    alike on both engines, rather than cut short or refused by the database."""
    if remote is None or (len(remote) <= REMOTE_MAX and remote.isprintable()):
        return remote
    raise refusal(
        "client-address-invalid",
        "X-Forwarded-For",
        "the forwarded client address is not an address",
        "the client address the audit trail records",
        value=printable(remote[:40]),
        allowed=f"printable, at most {REMOTE_MAX} characters",
        issue_type="value",
    )
