"""Engines and migrations: SQLite (WAL, busy timeout) by default, PostgreSQL in production."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from alembic import command
from alembic.config import Config
from sqlalchemy import Engine, create_engine, event, text
from sqlalchemy.engine import make_url

from service.errors import UnavailableError
from service.store.ledger import Ledger
from service.store.ledger_pg import PostgresLedger
from service.store.ledger_sqlite import SqliteLedger

MIGRATIONS = Path(__file__).parent / "migrations"
# How long SQLite waits for another writer before giving up (ms): writers queue, clients
# never see "database is locked" under a clinic's load.
SQLITE_BUSY_MS = 15000


def make_engine(url: str) -> Engine:
    """An engine for the URL, set up for concurrent use."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        engine = create_engine(
            url, connect_args={"check_same_thread": False, "timeout": SQLITE_BUSY_MS / 1000}
        )
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=5, max_overflow=10)


def open_ledger(url: str) -> Ledger:
    """The request path's store for the URL (service.store.ledger)."""
    if make_url(url).get_backend_name() == "sqlite":
        return SqliteLedger(url)
    return PostgresLedger(url)


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_MS}")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


def upgrade(engine: Engine) -> None:
    """Bring the schema to the newest migration (safe to run on every start)."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    with engine.begin() as connection:
        if connection.dialect.name == "postgresql":
            # Several containers may start at once: one migrates, the others wait for it.
            connection.execute(text("select pg_advisory_xact_lock(5150011)"))
        config.attributes["connection"] = connection
        command.upgrade(config, "head")


def ping(engine: Engine) -> None:
    """Raise UnavailableError when the database does not answer."""
    try:
        with engine.connect() as connection:
            connection.execute(text("select 1"))
    except Exception as exc:  # any driver error means "not ready"
        raise UnavailableError("the database is not reachable") from exc
