"""Bearer tokens: how one is made and how it is kept (only its SHA-256 digest is stored)."""

from __future__ import annotations

import hashlib
import secrets

# A recognisable prefix lets secret scanners spot leaked tokens; it is not a secret.
TOKEN_PREFIX = "cap_"  # noqa: S105


def new_secret() -> str:
    """A fresh token: 256 random bits after the prefix."""
    return TOKEN_PREFIX + secrets.token_urlsafe(32)


def hash_token(token: str) -> str:
    """SHA-256 of a token: tokens are long random strings, so a plain hash is enough."""
    return hashlib.sha256(token.encode()).hexdigest()


# Lengths that callers check before a row reaches the database, so both engines answer
# alike (SQLite would keep a longer value; PostgreSQL refuses it).
LABEL_MAX = 100  # a token's label, and the actor of an audit entry
REMOTE_MAX = 64  # the client address of an audit entry
