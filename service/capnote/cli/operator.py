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
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Annotated, TypeVar

import typer

from capnote.config import Settings
from capnote.plain_text import printable
from capnote.tokens import LABEL_MAX

# The demo clinician's staff identifier (invented, like the demo notes' clinicians).
DEMO_STAFF = ("https://harbourside-eye.example/fhir/sid/staff", "S-DEMO")

if TYPE_CHECKING:
    from capnote.store.base import AuditRow, Store

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
    label: Annotated[
        str,
        typer.Option(
            help="Whose it is: the person's display name ('Dr Ilona Marsh') or the system "
            "client's name ('EHR interface'); the audit trail and signatures show it."
        ),
    ],
    staff_id: Annotated[
        str | None,
        typer.Option(
            help="The person's staff identifier as system|value (required for a clinician: "
            "a signature names who signed)."
        ),
    ] = None,
    expires_days: Annotated[
        int | None, typer.Option(min=1, max=3650, help="Days until the token stops working.")
    ] = None,
) -> None:
    """Create a token and print it once; only its hash is kept."""
    if role not in ROLES:
        raise typer.BadParameter(f"use one of {', '.join(ROLES)}", param_hint="--role")
    staff = _staff(staff_id, role)
    if not (0 < len(label.strip()) <= LABEL_MAX and label.isprintable()):
        # Checked here so both engines answer alike (PostgreSQL would refuse it, SQLite keep it).
        raise typer.BadParameter(
            f"printable text of 1 to {LABEL_MAX} characters (this one has {len(label)})",
            param_hint="--label",
        )
    now = datetime.now(UTC)
    expires = None if expires_days is None else now + timedelta(days=expires_days)

    async def create(store: Store) -> tuple[str, int]:
        made = await store.new_token(role, label, now, staff=staff, expires_at=expires)
        await store.record(
            _operator(now, "token-create", made[1], f"token {made[1]} ({role})"), None, None
        )
        return made

    token, token_id = _with_store(create, migrate=True)
    until = f", expires {expires:%Y-%m-%d %H:%M} UTC" if expires else ""
    typer.echo(f"token {token_id} ({role}, {printable(label)}{until}); shown once, keep it safe:")
    typer.echo(token)


def _operator(now: datetime, action: str, token_id: int, detail: str) -> AuditRow:
    """An audit entry for what the operator did at the command line."""
    from capnote.store.base import AuditRow  # the store loads only for commands that need it

    return AuditRow(now, "operator (command line)", "operator", action, None, token_id, detail)


def _staff(text: str | None, role: str) -> tuple[str, str] | None:
    """A staff identifier from system|value; a clinician token must have one."""
    if text is None:
        if role == "clinician":
            raise typer.BadParameter(
                "a clinician token belongs to a named person: give --staff-id system|value",
                param_hint="--staff-id",
            )
        return None
    system, sep, value = text.partition("|")
    if not (sep and 0 < len(system) <= 255 and 0 < len(value) <= 64 and text.isprintable()):
        raise typer.BadParameter(
            "system|value, the system up to 255 and the value up to 64 printable characters",
            param_hint="--staff-id",
        )
    return system, value


@token_app.command("list")
def token_list() -> None:
    """Every token: id, role, whose, staff id, created, expires, last used, state (never the
    token itself)."""
    now = datetime.now(UTC)
    typer.echo("id\trole\tlabel\tstaff\tcreated\texpires\tlast used\tstate")
    for row in _with_store(lambda store: store.tokens(), migrate=True):
        if row.revoked_at:
            state = f"revoked {row.revoked_at:%Y-%m-%d}"
        elif row.expires_at is not None and row.expires_at <= now:
            state = "expired"
        else:
            state = "live"
        staff = f"{row.staff_system}|{row.staff_value}" if row.staff_value else "-"
        expires = f"{row.expires_at:%Y-%m-%d %H:%M}" if row.expires_at else "never"
        used = f"{row.last_used_at:%Y-%m-%d %H:%M}" if row.last_used_at else "never"
        cells = (row.id, row.role, row.label, staff, f"{row.created_at:%Y-%m-%d}", expires, used)
        typer.echo("\t".join(printable(str(c)) for c in cells) + f"\t{state}")


@token_app.command("revoke")
def token_revoke(token_id: Annotated[int, typer.Argument(help="The id from token list.")]) -> None:
    """Revoke a token: it answers 401 from now on."""

    async def revoke(store: Store) -> bool:
        now = datetime.now(UTC)
        done = await store.revoke_token(token_id, now)
        if done:
            await store.record(
                _operator(now, "token-revoke", token_id, f"token {token_id}"), None, None
            )
        return done

    if not _with_store(revoke):
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
        # The invented demo clinic's numbering systems, unless the site set its own.
        for name, system in DEMO_SYSTEMS.items():
            if getattr(settings, name) is None:  # set neither in the environment nor .env
                os.environ[f"CAPNOTE_{name.upper()}"] = system
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


DEMO_SYSTEMS = {
    "patient_id_system": "https://harbourside-eye.example/fhir/sid/mrn",
    "visit_id_system": "https://harbourside-eye.example/fhir/sid/visit",
    "staff_id_system": "https://harbourside-eye.example/fhir/sid/staff",
}
"""The numbering systems of the demo notes (examples/notes), for `capnote serve --demo`."""


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
            token, _id = await notes.store.new_token(
                "clinician", "Demo Clinician", datetime.now(UTC), staff=DEMO_STAFF
            )
            return str(token)
        finally:
            await notes.store.aclose()

    token = asyncio.run(load())
    typer.echo(f"demo notes loaded; demo clinician token: {token}")
