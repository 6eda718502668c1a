"""The operator's commands: serve, database, tokens, the forwarding outbox and delivery.

The store's libraries (SQLAlchemy, the migrations, httpx for delivery) are imported by the
commands that use them, not with this module: every command of the command line loads it,
and `capnote check` on one file should not wait half a second for a database it never opens.
"""

from __future__ import annotations

import asyncio
import os
import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from service.config import Settings

if TYPE_CHECKING:
    from sqlalchemy import Engine
    from sqlmodel import Session

DEMO_NOTES = Path(__file__).resolve().parents[2] / "examples" / "notes"
ROLES = ("submitter", "clinician", "analyst", "auditor")

token_app = typer.Typer(help="Bearer tokens: new, list, revoke.", no_args_is_help=True)
db_app = typer.Typer(help="The database: upgrade to the newest schema.", no_args_is_help=True)
outbox_app = typer.Typer(help="Forwarding outbox: list, retry, park.", no_args_is_help=True)


def _engine(url: str | None = None, *, migrate: bool = False) -> Engine:
    """An engine on the settings' database (or url), migrated to the newest schema if asked."""
    from service.store.database import make_engine, upgrade

    engine = make_engine(url or Settings().database_url)
    if migrate:
        upgrade(engine)
    return engine


@contextmanager
def _session(*, migrate: bool = False) -> Iterator[Session]:
    from sqlmodel import Session

    with Session(_engine(migrate=migrate)) as session:
        yield session


@db_app.command("upgrade")
def db_upgrade() -> None:
    """Apply every migration the database lacks (the service also does this on start)."""
    _engine(migrate=True)
    typer.echo("database is at the newest schema")


@token_app.command("new")
def token_new(
    role: Annotated[str, typer.Option(help="submitter, clinician, analyst or auditor.")],
    label: Annotated[str, typer.Option(help="Who or what holds it, e.g. 'EHR interface'.")],
) -> None:
    """Create a token and print it once; only its hash is kept."""
    if role not in ROLES:
        raise typer.BadParameter(f"use one of {', '.join(ROLES)}", param_hint="--role")
    from service.store import repository

    with _session(migrate=True) as session:
        token, row = repository.new_token(session, role, label, datetime.now(UTC))
        session.commit()
        typer.echo(f"token {row.id} ({role}, {label}); shown once, keep it safe:")
    typer.echo(token)


@token_app.command("list")
def token_list() -> None:
    """Every token: id, role, label, created, revoked (never the token itself)."""
    from service.store import repository

    with _session(migrate=True) as session:
        for row in repository.list_tokens(session):
            state = f"revoked {row.revoked_at:%Y-%m-%d}" if row.revoked_at else "live"
            typer.echo(f"{row.id}\t{row.role}\t{row.label}\t{row.created_at:%Y-%m-%d}\t{state}")


@token_app.command("revoke")
def token_revoke(token_id: Annotated[int, typer.Argument(help="The id from token list.")]) -> None:
    """Revoke a token: it answers 401 from now on."""
    from service.store import repository

    with _session() as session:
        if not repository.revoke_token(session, token_id, datetime.now(UTC)):
            typer.echo(f"no live token {token_id}", err=True)
            raise typer.Exit(1)
        session.commit()
    typer.echo(f"token {token_id} revoked")


@outbox_app.command("list")
def outbox_list(
    state: Annotated[
        str | None, typer.Option(help="pending, delivering, delivered, failed.")
    ] = None,
    limit: Annotated[int, typer.Option(min=1, max=10_000)] = 50,
) -> None:
    """Outbox entries, newest first: id, note, version, state, attempts, last answer."""
    from service.store import outbox

    with _session() as session:
        for e in outbox.listing(session, state, limit):
            typer.echo(
                f"{e.id}\t{e.note_key}\tv{e.version}\t{e.state}\t{e.attempts}\t"
                f"{e.last_status or ''}"
            )


def _set_entry(entry_id: int, state: str) -> None:
    from service.store import outbox

    with _session() as session:
        if not outbox.operator_set(session, entry_id, state, datetime.now(UTC)):
            typer.echo(f"no undelivered outbox entry {entry_id}", err=True)
            raise typer.Exit(1)
    typer.echo(f"outbox entry {entry_id}: {state}")


@outbox_app.command("retry")
def outbox_retry(entry_id: Annotated[int, typer.Argument(help="The id from outbox list.")]) -> None:
    """Send a parked or waiting entry again, now."""
    from service.store.outbox import PENDING

    _set_entry(entry_id, PENDING)


@outbox_app.command("park")
def outbox_park(entry_id: Annotated[int, typer.Argument(help="The id from outbox list.")]) -> None:
    """Stop trying an entry; it stays, marked failed, for a person to look at."""
    from service.store.outbox import FAILED

    _set_entry(entry_id, FAILED)


def deliver(
    once: Annotated[bool, typer.Option(help="Deliver what is due now, then stop.")] = False,
) -> None:
    """Run the delivery worker alone (CAPNOTE_FORWARD_URL and its credentials set)."""
    settings = Settings()
    receiver = settings.receiver()
    if receiver is None:
        raise typer.BadParameter("set CAPNOTE_FORWARD_URL first", param_hint="settings")
    from service.delivery import DeliveryWorker

    worker = DeliveryWorker(_engine(settings.database_url, migrate=True), receiver)
    try:
        if once:
            typer.echo(f"{worker.run_once()} entries tried")
            return
        stop = threading.Event()
        signal.signal(signal.SIGTERM, lambda *_: stop.set())
        typer.echo(f"delivering to {receiver.base_url} (Ctrl-C to stop)")
        try:
            worker.run_forever(stop)
        except KeyboardInterrupt:
            stop.set()
    finally:
        worker.close()


def serve(
    host: Annotated[str, typer.Option(help="Address to listen on.")] = "127.0.0.1",
    port: Annotated[int, typer.Option(help="Port to listen on.")] = 8000,
    workers: Annotated[int, typer.Option(min=1, max=64, help="Worker processes.")] = 1,
    demo: Annotated[bool, typer.Option(help="Load the demo notes and print a demo token.")] = False,
) -> None:
    """Run the REST service (SQLite file capnote.sqlite3 here unless CAPNOTE_DATABASE_URL)."""
    from service import serving

    settings = Settings()
    # Migrated once, here, so that workers never race to migrate.
    engine = _engine(settings.database_url, migrate=True)
    if demo:
        _load_demo(settings, engine)
    os.environ["CAPNOTE_MIGRATE_ON_START"] = "false"
    # The service has no /docs page (its script would come from a CDN, which the service's
    # CSP and many hospital networks refuse); the OpenAPI document is served as JSON.
    typer.echo(f"capnote serving on http://{host}:{port} (OpenAPI document at /openapi.json)")
    serving.run("service.app:app_from_environment", host, port, workers)


def _load_demo(settings: Settings, engine: Engine) -> None:
    """Store the example notes and print a clinician token to try the API with."""
    from sqlmodel import Session

    from service.app import create_app
    from service.notes import Principal
    from service.store import repository

    notes = create_app(settings.model_copy(update={"migrate_on_start": False})).state.notes
    who = Principal(label="demo loader", role="submitter")
    demo = sorted(DEMO_NOTES.glob("*.json"))
    if not demo:  # an installed wheel has no examples/: say so rather than serve nothing
        raise typer.BadParameter(
            f"no demo notes in {DEMO_NOTES}; run from a checkout", param_hint="--demo"
        )

    async def load() -> None:
        try:
            for path in demo:
                await notes.submit(path.read_bytes(), who)
        finally:
            await notes.ledger.aclose()

    asyncio.run(load())
    with Session(engine) as session:
        token, _row = repository.new_token(session, "clinician", "demo", datetime.now(UTC))
        session.commit()
    typer.echo(f"demo notes loaded; demo clinician token: {token}")
