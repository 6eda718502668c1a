"""The operator's commands: serve, database, tokens, the forwarding outbox and delivery.

The store's libraries (SQLAlchemy, the migrations, httpx for delivery) are imported by the
commands that use them, not with this module: every command of the command line loads it,
and `capnote check` on one file should not wait half a second for a database it never opens.
Each command runs its store calls in one event loop of its own (asyncio.run).
"""

from __future__ import annotations

import asyncio
import os
import signal
from collections.abc import Awaitable, Callable
from datetime import UTC, datetime
from typing import TYPE_CHECKING, Annotated, TypeVar

import typer

from capnote.config import Settings
from capnote.tokens import LABEL_MAX

if TYPE_CHECKING:
    from capnote.store.base import Store

T = TypeVar("T")

ROLES = ("submitter", "clinician", "analyst", "auditor")

token_app = typer.Typer(help="Bearer tokens: new, list, revoke.", no_args_is_help=True)
db_app = typer.Typer(help="The database: upgrade to the newest schema.", no_args_is_help=True)
outbox_app = typer.Typer(help="Forwarding outbox: list, retry, park.", no_args_is_help=True)


def _migrated(url: str | None = None) -> str:
    """The settings' database URL (or url), migrated to the newest schema."""
    from capnote.store.database import migrate

    url = url or Settings().database_url
    migrate(url)
    return url


def _with_store(work: Callable[[Store], Awaitable[T]], *, migrate: bool = False) -> T:
    """Run work on a store of the settings' database, then close it."""
    from capnote.store.database import open_store

    url = _migrated() if migrate else Settings().database_url

    async def run() -> T:
        store = open_store(url)
        try:
            return await work(store)
        finally:
            await store.aclose()

    return asyncio.run(run())


@db_app.command("upgrade")
def db_upgrade() -> None:
    """Apply every migration the database lacks (the service also does this on start)."""
    _migrated()
    typer.echo("database is at the newest schema")


@token_app.command("new")
def token_new(
    role: Annotated[str, typer.Option(help="submitter, clinician, analyst or auditor.")],
    label: Annotated[str, typer.Option(help="Who or what holds it, e.g. 'EHR interface'.")],
) -> None:
    """Create a token and print it once; only its hash is kept."""
    if role not in ROLES:
        raise typer.BadParameter(f"use one of {', '.join(ROLES)}", param_hint="--role")
    if not (0 < len(label.strip()) <= LABEL_MAX and label.isprintable()):
        # Checked here so both engines answer alike (PostgreSQL would refuse it, SQLite keep it).
        raise typer.BadParameter(
            f"printable text of 1 to {LABEL_MAX} characters (this one has {len(label)})",
            param_hint="--label",
        )
    token, token_id = _with_store(
        lambda store: store.new_token(role, label, datetime.now(UTC)), migrate=True
    )
    typer.echo(f"token {token_id} ({role}, {label}); shown once, keep it safe:")
    typer.echo(token)


@token_app.command("list")
def token_list() -> None:
    """Every token: id, role, label, created, revoked (never the token itself)."""
    for row in _with_store(lambda store: store.tokens(), migrate=True):
        state = f"revoked {row.revoked_at:%Y-%m-%d}" if row.revoked_at else "live"
        typer.echo(f"{row.id}\t{row.role}\t{row.label}\t{row.created_at:%Y-%m-%d}\t{state}")


@token_app.command("revoke")
def token_revoke(token_id: Annotated[int, typer.Argument(help="The id from token list.")]) -> None:
    """Revoke a token: it answers 401 from now on."""
    if not _with_store(lambda store: store.revoke_token(token_id, datetime.now(UTC))):
        typer.echo(f"no live token {token_id}", err=True)
        raise typer.Exit(1)
    typer.echo(f"token {token_id} revoked")


@outbox_app.command("list")
def outbox_list(
    state: Annotated[
        str | None, typer.Option(help="pending, delivering, delivered, failed.")
    ] = None,
    limit: Annotated[int, typer.Option(min=1, max=10_000)] = 50,
) -> None:
    """Outbox entries, newest first: id, note, version, state, attempts, last answer."""
    for e in _with_store(lambda store: store.outbox(state, limit)):
        typer.echo(
            f"{e.id}\t{e.note_key}\tv{e.version}\t{e.state}\t{e.attempts}\t{e.last_status or ''}"
        )


def _set_entry(entry_id: int, state: str) -> None:
    if not _with_store(lambda store: store.operator_set(entry_id, state, datetime.now(UTC))):
        typer.echo(f"no undelivered outbox entry {entry_id}", err=True)
        raise typer.Exit(1)
    typer.echo(f"outbox entry {entry_id}: {state}")


@outbox_app.command("retry")
def outbox_retry(entry_id: Annotated[int, typer.Argument(help="The id from outbox list.")]) -> None:
    """Send a parked or waiting entry again, now."""
    from capnote.store.base import PENDING

    _set_entry(entry_id, PENDING)


@outbox_app.command("park")
def outbox_park(entry_id: Annotated[int, typer.Argument(help="The id from outbox list.")]) -> None:
    """Stop trying an entry; it stays, marked failed, for a person to look at."""
    from capnote.store.base import FAILED

    _set_entry(entry_id, FAILED)


def deliver(
    once: Annotated[bool, typer.Option(help="Deliver what is due now, then stop.")] = False,
) -> None:
    """Run the delivery worker alone (CAPNOTE_FORWARD_URL and its credentials set)."""
    settings = Settings()
    receiver = settings.receiver()
    if receiver is None:
        raise typer.BadParameter("set CAPNOTE_FORWARD_URL first", param_hint="settings")
    from capnote.delivery import DeliveryWorker

    async def run(store: Store) -> None:
        worker = DeliveryWorker(store, receiver)
        try:
            if once:
                typer.echo(f"{await worker.run_once()} entries tried")
                return
            stop = asyncio.Event()
            asyncio.get_running_loop().add_signal_handler(signal.SIGTERM, stop.set)
            typer.echo(f"delivering to {receiver.base_url} (Ctrl-C to stop)")
            await worker.run_forever(stop)
        finally:
            await worker.aclose()

    try:
        _with_store(run, migrate=True)
    except KeyboardInterrupt:
        typer.echo("stopped")


def serve(
    host: Annotated[str, typer.Option(help="Address to listen on.")] = "127.0.0.1",
    port: Annotated[int, typer.Option(help="Port to listen on.")] = 8000,
    workers: Annotated[int, typer.Option(min=1, max=64, help="Worker processes.")] = 1,
    demo: Annotated[bool, typer.Option(help="Load the demo notes and print a demo token.")] = False,
) -> None:
    """Run the REST service (SQLite file capnote.sqlite3 here unless CAPNOTE_DATABASE_URL)."""
    from capnote import serving
    from capnote.connection_limits import ConnectionLimits

    settings = Settings()
    # Migrated once, here, so that workers never race to migrate.
    _migrated(settings.database_url)
    if demo:
        _load_demo(settings)
    os.environ["CAPNOTE_MIGRATE_ON_START"] = "false"
    # The service has no /docs page (its script would come from a CDN, which the service's
    # CSP and many hospital networks refuse); the OpenAPI document is served as JSON.
    typer.echo(f"capnote serving on http://{host}:{port} (OpenAPI document at /openapi.json)")
    limits = ConnectionLimits(
        max_head_bytes=settings.max_head_bytes,
        max_headers=settings.max_headers,
        head_timeout_s=settings.head_timeout_s,
        body_timeout_s=settings.body_timeout_s,
        max_connections=settings.max_connections,
    )
    serving.run(
        "capnote.app:app_from_environment",
        host,
        port,
        workers,
        limits,
        idle_timeout_s=settings.idle_timeout_s,
        trusted_proxies=settings.trusted_proxies,
        log_level=settings.log_level,
        log_format=settings.log_format,
    )


def _load_demo(settings: Settings) -> None:
    """Store the example notes and print a clinician token to try the API with."""
    from capnote.app import create_app
    from capnote.notes import Principal

    notes = create_app(settings.model_copy(update={"migrate_on_start": False})).state.notes
    who = Principal(label="demo loader", role="submitter")
    from capnote.demo_notes import demo_notes

    demo = demo_notes()
    if not demo:  # a broken installation: say so rather than serve nothing
        raise typer.BadParameter("this installation has no demo notes", param_hint="--demo")

    async def load() -> str:
        try:
            for path in demo:
                await notes.submit(path.read_bytes(), who)
            token, _id = await notes.store.new_token("clinician", "demo", datetime.now(UTC))
            return str(token)
        finally:
            await notes.store.aclose()

    token = asyncio.run(load())
    typer.echo(f"demo notes loaded; demo clinician token: {token}")
