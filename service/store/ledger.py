"""The request path's reads and writes, on the database driver's own connections.

Every submission asks the same few things of the store: the token, whether the note is
already there, the eye's earlier sessions, and one transaction that adds the version, its
search rows, its audit entry and its outbox entry. Through the ORM these cost more than
the clinical work itself, so here they are statements compiled once from the tables'
definitions (one text per database, no per-call compilation) and run on the driver's
connection. Everything else (listings, searches, tokens on the command line, the outbox
worker) stays on SQLAlchemy sessions (service.store.repository, service.store.outbox).

How calls are run differs by engine, behind one async interface:

- SQLite: statements take microseconds, so they run on the event loop itself, on one
  connection per process. Writers from several processes take turns on the write lock; a
  writer that finds it taken does not sleep in SQLite's busy handler (which would stop the
  loop for a millisecond or more) but awaits a short back-off and tries again, so the loop
  keeps serving meanwhile. WAL checkpoints run in a thread of their own
  (``start_checkpoints``), off the request path.
- PostgreSQL: each call runs in a worker thread on a pooled connection, its statements
  pipelined, so waiting on the network never holds the loop.

Uniqueness and idempotency still rest on the database: (note_key, version) is unique, and a
second writer of the same version gets DuplicateVersionError.
"""

from __future__ import annotations

import asyncio
import hmac
import logging
import random
import sqlite3
import threading
import time
from collections.abc import Callable, Sequence
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, TypeVar

import psycopg
from anyio import to_thread
from sqlalchemy import Engine, and_, bindparam, create_engine, event, func, insert, select, update
from sqlalchemy.dialects import sqlite as sqlite_dialect
from sqlalchemy.engine import Dialect, make_url
from sqlalchemy.sql import ClauseElement

from service.errors import UnavailableError
from service.store.tables import ApiToken, AuditEntry, FhirIndex, NoteVersion, OutboxEntry

log = logging.getLogger("capnote.store")
T = TypeVar("T")

_NOTE = NoteVersion.__table__  # type: ignore[attr-defined]
_INDEX = FhirIndex.__table__  # type: ignore[attr-defined]
_AUDIT = AuditEntry.__table__  # type: ignore[attr-defined]
_OUTBOX = OutboxEntry.__table__  # type: ignore[attr-defined]
_TOKEN = ApiToken.__table__  # type: ignore[attr-defined]

# How long a SQLite writer keeps trying for the write lock before answering 503.
SQLITE_LOCK_WAIT_S = 15.0


class DuplicateVersionError(Exception):
    """Another writer stored this (note, version) first."""


@dataclass(frozen=True, slots=True)
class TokenRow:
    """A live token's label and role."""

    label: str
    role: str


@dataclass(frozen=True, slots=True)
class EarlierSession:
    """An earlier session on the same eye, as the store holds it."""

    note_key: str
    started_at: datetime
    total_energy_mj: float


@dataclass(frozen=True, slots=True)
class VersionRow:
    """One stored note version, as written and as read back."""

    note_key: str
    version: int
    sender_system: str
    sender_value: str
    patient_system: str
    patient_value: str
    eye: str
    started_at: datetime
    status: str
    total_energy_mj: float | None
    content_hash: str
    note_json: str
    result_json: str
    bundle: bytes  # compressed (service.store.codec)
    roles: str  # packed (service.store.codec)
    reason: str | None
    recorded_at: datetime
    recorded_by: str


_VERSION_COLUMNS = tuple(VersionRow.__slots__)


@dataclass(frozen=True, slots=True)
class IndexRow:
    """One searchable resource of a version: what fhir_index holds."""

    role: str
    resource_type: str
    status: str
    date: datetime | None


@dataclass(frozen=True, slots=True)
class AuditRow:
    """Who did what to which version, from where."""

    at: datetime
    actor: str
    role: str
    action: str
    remote: str | None


@dataclass(frozen=True, slots=True)
class NewVersion:
    """Everything one stored version adds: its row, its search rows, its audit entry."""

    row: VersionRow
    index: tuple[IndexRow, ...]
    audit: AuditRow


# --- the statements, defined once against the tables ---------------------------------------

_newest_of_patient = (
    select(_NOTE.c.note_key, func.max(_NOTE.c.version).label("v"))
    .where(
        _NOTE.c.patient_system == bindparam("patient_system"),
        _NOTE.c.patient_value == bindparam("patient_value"),
    )
    .group_by(_NOTE.c.note_key)
    .subquery()
)
_STATEMENTS: dict[str, ClauseElement] = {
    "token": select(_TOKEN.c.token_hash, _TOKEN.c.label, _TOKEN.c.role, _TOKEN.c.revoked_at).where(
        _TOKEN.c.token_hash == bindparam("digest")
    ),
    "hashes": select(_NOTE.c.content_hash)
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version),
    # Latest versions of the patient's notes on this eye that started earlier: the inputs to
    # cumulative energy (a note amended onto another patient counts under its newest one).
    "earlier": select(_NOTE.c.note_key, _NOTE.c.started_at, _NOTE.c.total_energy_mj, _NOTE.c.status)
    .join(
        _newest_of_patient,
        and_(
            _NOTE.c.note_key == _newest_of_patient.c.note_key,
            _NOTE.c.version == _newest_of_patient.c.v,
        ),
    )
    .where(_NOTE.c.eye == bindparam("eye"), _NOTE.c.started_at < bindparam("before"))
    .order_by(_NOTE.c.started_at, _NOTE.c.note_key)
    .limit(10_000),
    "latest": select(*(_NOTE.c[name] for name in _VERSION_COLUMNS))
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version.desc())
    .limit(1),
    "version": select(*(_NOTE.c[name] for name in _VERSION_COLUMNS)).where(
        _NOTE.c.note_key == bindparam("key"), _NOTE.c.version == bindparam("version")
    ),
    "versions": select(*(_NOTE.c[name] for name in _VERSION_COLUMNS))
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version),
    "add_version": insert(_NOTE)
    .inline()
    .values({name: bindparam(name) for name in _VERSION_COLUMNS}),
    "retire": update(_INDEX)
    .where(_INDEX.c.note_key == bindparam("key"), _INDEX.c.latest.is_(True))
    .values(latest=False),
    "add_index": insert(_INDEX)
    .inline()
    .values(
        {
            name: bindparam(name)
            for name in ("note_key", "role", "version", "resource_type", "status", "date")
        }
        | {"latest": True}
    ),
    "add_audit": insert(_AUDIT)
    .inline()
    .values(
        {
            name: bindparam(name)
            for name in ("at", "actor", "role", "action", "note_key", "version", "remote")
        }
        | {"outcome": "ok"}
    ),
    "add_outbox": insert(_OUTBOX)
    .inline()
    .values(
        {
            "note_key": bindparam("note_key"),
            "version": bindparam("version"),
            "state": "pending",
            "attempts": 0,
            "next_attempt_at": bindparam("at"),
            "created_at": bindparam("at"),
        }
    ),
}


@dataclass(frozen=True, slots=True)
class _Sql:
    """A statement's text for one dialect, and the values it was written with (limits,
    constant column values), which every execution passes along with its own."""

    text: str
    constants: dict[str, Any]

    def params(self, values: dict[str, Any]) -> dict[str, Any]:
        """The parameters for one execution."""
        return {**self.constants, **values}


def _compiled(dialect: Dialect) -> dict[str, _Sql]:
    """Every statement's SQL for this dialect, with named parameters."""
    out = {}
    for name, statement in _STATEMENTS.items():
        compiled = statement.compile(dialect=dialect)
        constants = {k: v for k, v in compiled.params.items() if v is not None}
        out[name] = _Sql(str(compiled), constants)
    return out


# --- the ledger ------------------------------------------------------------------------------


class Ledger:
    """The request path's store operations for one database (see the module docstring)."""

    def __init__(self, url: str) -> None:
        parsed = make_url(url)
        self.sqlite = parsed.get_backend_name() == "sqlite"
        self._connection: sqlite3.Connection | None = None
        self._checkpointer: Checkpointer | None = None
        self._engine: Engine | None = None
        # A sqlite3 connection must not be used by two threads at once: calls run on the
        # loop, but tests and the command line may call from other threads.
        self._lock: AbstractContextManager[Any] = nullcontext()
        if self.sqlite:
            self._sql = _compiled(sqlite_dialect.dialect(paramstyle="named"))
            self._path = parsed.database or ":memory:"
            self._lock = threading.Lock()
        else:
            # A pool of its own: no pre-ping (a dead connection is found by the statement
            # itself, thrown away, and the call answered 503) and no reset on return (reads
            # run in autocommit, writes end their transaction), each of which would cost a
            # round trip per call.
            self._engine = create_engine(
                url, pool_size=8, max_overflow=8, pool_pre_ping=False, pool_reset_on_return=None
            )
            event.listen(self._engine, "connect", _autocommit)
            self._sql = _compiled(self._engine.dialect)

    # -- running calls ------------------------------------------------------------------------

    async def _run(self, work: Callable[[Any], T]) -> T:
        """Run work(cursor-owning connection) as this engine runs calls."""
        if self.sqlite:
            return await self._run_sqlite(work)
        return await to_thread.run_sync(self._run_pooled, work)

    def _sqlite_connection(self) -> sqlite3.Connection:
        if self._connection is None:
            connection = sqlite3.connect(
                self._path, isolation_level=None, check_same_thread=False, timeout=0
            )
            for pragma in (
                "journal_mode=WAL",
                "synchronous=NORMAL",
                "foreign_keys=ON",
                # A busy lock answers at once: the loop waits by awaiting, not sleeping.
                "busy_timeout=0",
            ):
                connection.execute(f"PRAGMA {pragma}")
            self._connection = connection
        return self._connection

    async def _run_sqlite(self, work: Callable[[Any], T]) -> T:
        deadline = time.monotonic() + SQLITE_LOCK_WAIT_S
        delay = 0.0002
        while True:
            # A lock, though calls run on the loop: tests and the command line may call from
            # other threads, and a sqlite3 connection must not be used by two at once.
            with self._lock:
                connection = self._sqlite_connection()
                try:
                    return work(connection)
                except sqlite3.OperationalError as exc:
                    if connection.in_transaction:
                        connection.rollback()
                    if not _locked(exc):
                        raise UnavailableError("the database cannot be used right now") from exc
            if time.monotonic() > deadline:
                raise UnavailableError("the database stayed locked; retry after a few seconds")
            # Another process holds the write lock for well under a millisecond: wait a little,
            # with jitter so that two waiting processes do not retry in step.
            await asyncio.sleep(delay * (0.5 + random.random()))  # noqa: S311 (not security)
            delay = min(delay * 2, 0.005)

    def _run_pooled(self, work: Callable[[Any], T]) -> T:
        assert self._engine is not None
        try:
            connection = self._engine.raw_connection()
        except Exception as exc:  # any driver error while connecting: the database is away
            raise UnavailableError("the database is not reachable right now") from exc
        try:
            return work(connection.driver_connection)
        except psycopg.OperationalError as exc:
            connection.invalidate()  # the server went away: never reuse this connection
            raise UnavailableError("the database is not reachable right now") from exc
        finally:
            if connection.is_valid:
                connection.close()

    # -- checkpoints (SQLite) -----------------------------------------------------------------

    def start_checkpoints(self) -> None:
        """Move SQLite's WAL checkpoints to a thread of their own (the service does this)."""
        if not self.sqlite or self._checkpointer is not None:
            return
        with self._lock:
            self._sqlite_connection().execute("PRAGMA wal_autocheckpoint=0")
        self._checkpointer = Checkpointer(self._path)
        self._checkpointer.start()

    def close(self) -> None:
        """Stop the checkpoints and close every connection."""
        if self._checkpointer is not None:
            self._checkpointer.stop()
            self._checkpointer = None
        with self._lock:
            if self._connection is not None:
                self._connection.close()
                self._connection = None
        if self._engine is not None:
            self._engine.dispose()

    # -- the operations -----------------------------------------------------------------------

    async def token(self, digest: str) -> TokenRow | None:
        """The live token with this SHA-256 digest, or None."""
        sql = self._sql["token"]

        def work(connection: Any) -> TokenRow | None:
            row = _one(connection, sql, {"digest": digest})
            if row is None or row[3] is not None or not hmac.compare_digest(row[0], digest):
                return None
            return TokenRow(label=row[1], role=row[2])

        return await self._run(work)

    async def before_write(
        self, key: str, patient: tuple[str, str], eye: str, before: datetime
    ) -> tuple[list[str], list[EarlierSession]]:
        """For a submission: the content digests of the note's stored versions (none for a
        new note) and the eye's earlier sessions (excluding this note and voided ones)."""
        hashes_sql, earlier_sql = self._sql["hashes"], self._sql["earlier"]
        params = {
            "patient_system": patient[0],
            "patient_value": patient[1],
            "eye": eye,
            "before": self._moment(before),
        }

        def work(connection: Any) -> tuple[list[str], list[EarlierSession]]:
            hashes = [digest for (digest,) in _all(connection, hashes_sql, {"key": key})]
            earlier = [
                EarlierSession(k, self._read_moment(started), energy or 0.0)
                for k, started, energy, status in _all(connection, earlier_sql, params)
                if k != key and status != "void"
            ]
            return hashes, earlier

        return await self._run(work)

    async def earlier_sessions(
        self, key: str, patient: tuple[str, str], eye: str, before: datetime
    ) -> list[EarlierSession]:
        """The eye's earlier sessions (see before_write); for amendments and voids."""
        _hashes, earlier = await self.before_write(key, patient, eye, before)
        return earlier

    async def latest(self, key: str) -> VersionRow | None:
        """The newest version of a note, or None."""
        rows = await self._versions("latest", {"key": key})
        return rows[0] if rows else None

    async def version(self, key: str, version: int) -> VersionRow | None:
        """One version of a note, or None."""
        rows = await self._versions("version", {"key": key, "version": version})
        return rows[0] if rows else None

    async def versions(self, key: str) -> list[VersionRow]:
        """Every version of a note, oldest first."""
        return await self._versions("versions", {"key": key})

    async def _versions(self, name: str, params: dict[str, Any]) -> list[VersionRow]:
        sql = self._sql[name]

        def work(connection: Any) -> list[VersionRow]:
            return [self._version_row(row) for row in _all(connection, sql, params)]

        return await self._run(work)

    async def write_many(self, versions: Sequence[NewVersion], *, forward: bool) -> None:
        """Add each version, its search rows (retiring the note's previous ones), its audit
        entry and, when forwarding, its outbox entry, in one transaction: all or nothing.
        DuplicateVersionError when another writer stored one of these versions first."""
        steps = [step for v in versions for step in self._steps(v, forward=forward)]

        def statements(execute: Callable[[str, Any], Any], many: Callable[[str, Any], Any]) -> None:
            for sql, params in steps:
                if isinstance(params, list):
                    many(sql.text, [sql.params(p) for p in params])
                else:
                    execute(sql.text, sql.params(params))

        if self.sqlite:

            def on_sqlite(connection: sqlite3.Connection) -> None:
                # IMMEDIATE: the write lock is taken here or not at all, so a busy database
                # is met before anything is written and the whole call can be retried.
                connection.execute("BEGIN IMMEDIATE")
                try:
                    statements(connection.execute, connection.executemany)
                    connection.execute("COMMIT")
                except sqlite3.IntegrityError as exc:
                    connection.rollback()
                    raise DuplicateVersionError from exc
                except BaseException:
                    if connection.in_transaction:
                        connection.rollback()
                    raise

            await self._run(on_sqlite)
            return

        def on_postgres(connection: psycopg.Connection[Any]) -> None:
            try:
                # The transaction's statements go out together: one round trip, not six.
                with connection.pipeline(), connection.transaction(), connection.cursor() as cur:
                    statements(cur.execute, cur.executemany)
            except psycopg.errors.UniqueViolation as exc:
                raise DuplicateVersionError from exc

        await self._run(on_postgres)

    def _steps(self, new: NewVersion, *, forward: bool) -> list[tuple[_Sql, Any]]:
        """The statements (and their parameters) that store one version."""
        row, sql = new.row, self._sql
        version = {name: getattr(row, name) for name in _VERSION_COLUMNS}
        version["started_at"] = self._moment(row.started_at)
        version["recorded_at"] = self._moment(row.recorded_at)
        steps: list[tuple[_Sql, Any]] = [(sql["add_version"], version)]  # the constraint first
        if row.version > 1:
            steps.append((sql["retire"], {"key": row.note_key}))
        if new.index:
            rows = [
                {
                    "note_key": row.note_key,
                    "role": i.role,
                    "version": row.version,
                    "resource_type": i.resource_type,
                    "status": i.status,
                    "date": None if i.date is None else self._moment(i.date),
                }
                for i in new.index
            ]
            steps.append((sql["add_index"], rows))
        audit = new.audit
        steps.append(
            (
                sql["add_audit"],
                {
                    "at": self._moment(audit.at),
                    "actor": audit.actor,
                    "role": audit.role,
                    "action": audit.action,
                    "note_key": row.note_key,
                    "version": row.version,
                    "remote": audit.remote,
                },
            )
        )
        if forward:
            at = self._moment(row.recorded_at)
            steps.append(
                (sql["add_outbox"], {"note_key": row.note_key, "version": row.version, "at": at})
            )
        return steps

    # -- values in and out --------------------------------------------------------------------

    def _moment(self, moment: datetime) -> Any:
        """A time as this engine's column takes it: UTC (SQLite keeps SQLAlchemy's text form,
        which the ORM reads back)."""
        utc = moment.astimezone(UTC)
        if self.sqlite:
            return utc.strftime("%Y-%m-%d %H:%M:%S.%f")
        return utc

    @staticmethod
    def _read_moment(value: Any) -> datetime:
        moment = datetime.fromisoformat(value) if isinstance(value, str) else value
        assert isinstance(moment, datetime)
        return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)

    def _version_row(self, row: Sequence[Any]) -> VersionRow:
        values = dict(zip(_VERSION_COLUMNS, row, strict=True))
        values["started_at"] = self._read_moment(values["started_at"])
        values["recorded_at"] = self._read_moment(values["recorded_at"])
        values["bundle"] = bytes(values["bundle"])
        return VersionRow(**values)


class Checkpointer:
    """Copies SQLite's write-ahead log into the database file from a thread of its own.

    With automatic checkpoints, the commit that crosses the threshold copies every page and
    syncs the file, stalling its request (and, on the event loop, every other) for
    milliseconds. Here a passive checkpoint, which never blocks writers, runs a few times a
    second; a page written many times in between is copied once. Under steady writing a
    passive checkpoint never catches the log's end, so the log would grow without bound:
    once it holds RESTART_FRAMES, a restarting checkpoint takes the write lock for the
    little that is left (writers await it: see Ledger._run_sqlite) and the log starts over.
    """

    INTERVAL_S = 0.2
    RESTART_FRAMES = 4000

    def __init__(self, path: str) -> None:
        self.path = path
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="capnote-checkpoint", daemon=True)

    def start(self) -> None:
        """Begin checkpointing."""
        self._thread.start()

    def stop(self) -> None:
        """Checkpoint once more and end the thread."""
        self._stop.set()
        self._thread.join(timeout=30)

    def _loop(self) -> None:
        # The busy timeout lets a restarting checkpoint wait for the writer of the moment.
        connection = sqlite3.connect(self.path, isolation_level=None, timeout=2)
        try:
            while not self._stop.wait(self.INTERVAL_S):
                self._checkpoint(connection)
            self._checkpoint(connection)
        finally:
            connection.close()

    def _checkpoint(self, connection: sqlite3.Connection) -> None:
        try:
            # (busy, frames in the log, frames copied); fetched, so no statement stays open
            # (an open one would hold a read mark and keep the log from starting over).
            _busy, frames, _copied = connection.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()
            if frames >= self.RESTART_FRAMES:
                connection.execute("PRAGMA wal_checkpoint(RESTART)").fetchone()
        except sqlite3.Error as exc:  # a checkpoint that fails is retried by the next one
            log.warning("WAL checkpoint skipped: %s", type(exc).__name__)


def _autocommit(dbapi_connection: Any, _record: Any) -> None:
    # Reads then need no BEGIN and COMMIT round trips; writes open a transaction themselves.
    dbapi_connection.autocommit = True


def _locked(exc: sqlite3.OperationalError) -> bool:
    text = str(exc)
    return "locked" in text or "busy" in text


def _one(connection: Any, sql: _Sql, params: dict[str, Any]) -> Any:
    """The first row of a query, on a sqlite3 or a psycopg connection (both have execute).

    Every row is fetched: a SQLite statement left unfinished keeps its read snapshot, which
    stops checkpoints at that point and keeps the log from ever starting over.
    """
    rows = _all(connection, sql, params)
    return rows[0] if rows else None


def _all(connection: Any, sql: _Sql, params: dict[str, Any]) -> list[Any]:
    """Every row of a query, on a sqlite3 or a psycopg connection."""
    return list(connection.execute(sql.text, sql.params(params)).fetchall())
