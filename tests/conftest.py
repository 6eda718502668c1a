"""Shared fixtures: the default policy, a fixed present time and the example notes."""

from __future__ import annotations

import asyncio
import json
from collections.abc import Callable, Coroutine, Iterator
from datetime import UTC, datetime
from itertools import count
from pathlib import Path
from typing import Any, TypeVar

import pytest
from fastapi.testclient import TestClient

from capnote.app import create_app
from capnote.assess import Assessor
from capnote.config import Settings
from capnote.notes import NoteService, Principal, StoredNote
from capnote.policy import Policy, load_policy
from capnote.store.base import Store
from capnote.store.database import migrate, open_store
from tests.pg_cluster import PgCluster
from tests.pg_fixtures import postgres_cluster  # noqa: F401

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples"
VALID = sorted((EXAMPLES / "notes").glob("*.json"))
INVALID = sorted((EXAMPLES / "invalid").glob("*.json"))
# The examples are set in late November 2026; checks run as if on this day.
NOW = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)
T = TypeVar("T")


@pytest.fixture(scope="session")
def policy() -> Policy:
    return load_policy()


@pytest.fixture(scope="session")
def assessor(policy: Policy) -> Assessor:
    return Assessor(policy)


def load(path: Path) -> dict[str, Any]:
    data: dict[str, Any] = json.loads(path.read_text())
    return data


def routine() -> dict[str, Any]:
    """A fresh copy of the routine right-eye demo note, to change in a test."""
    return load(EXAMPLES / "notes" / "right-routine.json")


# --- the service on both engines -------------------------------------------------------------

_databases = count()


@pytest.fixture(params=["sqlite", "postgres"])
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """An empty database of each engine: a real SQLite file and a real PostgreSQL server."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'capnote.sqlite3'}"
    cluster: PgCluster = request.getfixturevalue("postgres_cluster")
    return cluster.fresh_database(f"capnote_{next(_databases)}")


def on_store(url: str, work: Callable[[Store], Coroutine[Any, Any, T]]) -> T:
    """Run work on a store of the (migrated) database at url, in a loop of its own."""

    async def run() -> T:
        store = open_store(url)
        try:
            return await work(store)
        finally:
            await store.aclose()

    return asyncio.run(run())


def new_token(
    url: str,
    role: str,
    label: str,
    now: datetime = NOW,
    *,
    staff: tuple[str, str] | None = None,
    expires_at: datetime | None = None,
) -> tuple[str, int]:
    """A token in the database at url: (the token, its id)."""
    migrate(url)
    return on_store(
        url, lambda store: store.new_token(role, label, now, staff=staff, expires_at=expires_at)
    )


def revoke_token(url: str, token_id: int, now: datetime = NOW) -> bool:
    """Revoke a token in the database at url."""
    return on_store(url, lambda store: store.revoke_token(token_id, now))


class Api:
    """A test client with a token per role."""

    def __init__(self, client: TestClient, tokens: dict[str, str], url: str) -> None:
        self.client = client
        self.tokens = tokens
        self.url = url

    def headers(self, role: str | None, **extra: str) -> dict[str, str]:
        base = {"content-type": "application/json", **extra}
        if role is not None:
            base["authorization"] = f"Bearer {self.tokens[role]}"
        return base


@pytest.fixture
def api(database_url: str) -> Iterator[Api]:
    """The whole app on an empty database, with the clock at NOW."""
    app = create_app(Settings(database_url=database_url), clock=lambda: NOW)
    tokens = {
        role: new_token(database_url, role, f"test {role}")[0]
        for role in ("submitter", "clinician", "analyst", "auditor")
    }
    with TestClient(app) as client:
        yield Api(client, tokens, database_url)


class SyncNotes:
    """A NoteService called from plain test code: every call runs in one event loop of its
    own (a PostgreSQL store's pool belongs to the loop that opened it)."""

    def __init__(self, service: NoteService) -> None:
        self.service = service
        self._runner = asyncio.Runner()

    def run(self, call: Coroutine[Any, Any, T]) -> T:
        """Await one call."""
        return self._runner.run(call)

    def submit(self, payload: bytes, who: Principal) -> tuple[bool, StoredNote]:
        return self.run(self.service.submit(payload, who))

    def amend(self, key: str, body: bytes, who: Principal, if_match: int) -> StoredNote:
        return self.run(self.service.amend(key, body, who, if_match))

    def void(self, key: str, body: bytes, who: Principal, if_match: int) -> StoredNote:
        return self.run(self.service.void(key, body, who, if_match))

    def get(self, key: str, version: int | None = None) -> StoredNote:
        return self.run(self.service.get(key, version))

    def versions(self, key: str) -> list[dict[str, Any]]:
        return self.run(self.service.versions(key))

    @property
    def store(self) -> Store:
        return self.service.store

    def close(self) -> None:
        """Close the store (in its loop) and the loop."""
        self.run(self.service.store.aclose())
        self._runner.close()


def sync_notes(url: str, clock: Callable[[], datetime] = lambda: NOW, **kw: Any) -> SyncNotes:
    """A migrated database at url and a NoteService over it, called synchronously."""
    migrate(url)
    service = NoteService(open_store(url), Assessor(load_policy()), clock, **kw)
    return SyncNotes(service)
