"""Who is asking: a bearer token looked up on every request (revoking one takes effect at
once); on SQLite a few microseconds on the event loop, on PostgreSQL one round trip."""

from __future__ import annotations

from capnote.errors import AuthenticationError, ForbiddenError
from capnote.notes import Principal
from capnote.store.base import Store
from capnote.tokens import hash_token


class Access:
    """Tokens to principals."""

    def __init__(self, store: Store) -> None:
        self.store = store

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
        if row.role not in allowed:
            raise ForbiddenError(f"the role {row.role} may not do this")
        return Principal(label=row.label, role=row.role, remote=remote)
