"""The store on SQLite: statements on the event loop, checkpoints in a thread of their own.

SQLite statements take microseconds, so they run on the loop itself, on one connection per
process: no thread hop, no lock hand-over. Writers of several processes take turns on
SQLite's write lock; a writer that finds it taken does not sleep in SQLite's busy handler
(which would stop the loop for a millisecond or more) but awaits a short back-off and
tries again, so the loop keeps serving meanwhile. BEGIN IMMEDIATE takes the lock before
anything is written, so a busy database is met at the start and the whole call retried.

Writes are group-committed: the submissions that reach write_many in one turn of the event
loop are stored in one transaction, each in a savepoint of its own, so that under load one
commit (and one WAL append of the shared index pages) serves several notes.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import random
import sqlite3
import threading
import time
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from typing import Any, TypeVar

from sqlalchemy.dialects import sqlite as sqlite_dialect
from sqlalchemy.engine import make_url

from capnote.derive import PriorSession
from capnote.errors import UnavailableError
from capnote.store.base import (
    VERSION_COLUMNS,
    DuplicateVersionError,
    NewVersion,
    Sql,
    Store,
    audit_params,
    sessions_from_rows,
)

log = logging.getLogger("capnote.store")
T = TypeVar("T")
# One waiting write: its statements and the future its caller awaits.
_Write = tuple[list[tuple[Sql, Any]], "asyncio.Future[None]"]

# How long a writer keeps trying for the write lock before answering 503.
LOCK_WAIT_S = 15.0


def create_private(path: str) -> None:
    """Create the database file readable by its owner only, before SQLite does (it would
    follow the umask, often 0644). It holds patient data and token hashes; SQLite gives the
    -wal and -shm files the database file's mode, so they are private too."""
    if path in ("", ":memory:") or path.startswith("file:"):
        return
    # An existing file keeps its mode; a missing or read-only folder is left for SQLite to
    # report as it always has.
    with contextlib.suppress(OSError):
        os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600))


class SqliteStore(Store):
    """The store on one SQLite file (see the module docstring)."""

    def __init__(self, url: str) -> None:
        super().__init__(sqlite_dialect.dialect(paramstyle="named"))
        self._path = make_url(url).database or ":memory:"
        self._connection: sqlite3.Connection | None = None
        self._checkpointer: Checkpointer | None = None
        # A sqlite3 connection must not be used by two threads at once: calls run on the
        # loop, but tests and the command line may call from other threads.
        self._lock = threading.Lock()
        # Writes waiting for the next group commit, and the commits under way.
        self._waiting: list[_Write] = []
        self._commits: set[asyncio.Future[None]] = set()

    # -- running calls ------------------------------------------------------------------------

    def _open(self) -> sqlite3.Connection:
        if self._connection is None:
            create_private(self._path)
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
            if self._checkpointer is not None:
                connection.execute("PRAGMA wal_autocheckpoint=0")
            self._connection = connection
        return self._connection

    async def _run(self, work: Callable[[sqlite3.Connection], T]) -> T:
        deadline = time.monotonic() + LOCK_WAIT_S
        delay = 0.0002
        while True:
            with self._lock:
                connection = self._open()
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

    async def writable(self) -> bool:
        """The file and its folder (where SQLite puts the -wal and -shm) can be written."""
        if self._path == ":memory:" or self._path.startswith("file:"):
            return True
        folder = os.path.dirname(os.path.abspath(self._path))
        return os.access(self._path, os.W_OK) and os.access(folder, os.W_OK)

    # -- lifetime -----------------------------------------------------------------------------

    async def start(self) -> None:
        """Move the WAL checkpoints to a thread of their own."""
        if self._checkpointer is not None:
            return
        self._checkpointer = Checkpointer(self._path)
        with self._lock:
            if self._connection is not None:
                self._connection.execute("PRAGMA wal_autocheckpoint=0")
        self._checkpointer.start()

    async def aclose(self) -> None:
        """Stop the checkpoints and close the connection."""
        self.close()

    def close(self) -> None:
        """aclose() for callers without a loop (the command line, tests)."""
        if self._checkpointer is not None:
            self._checkpointer.stop()
            self._checkpointer = None
        with self._lock:
            if self._connection is not None:
                self._connection.close()
                self._connection = None

    # -- the operations -----------------------------------------------------------------------

    async def _fetch(self, sql: Sql, params: dict[str, Any]) -> list[Any]:
        return await self._run(lambda connection: _all(connection, sql, params))

    def _time(self, moment: datetime) -> str:
        return _moment(moment)

    async def before_write(
        self, key: str, patient: tuple[str, str], eye: str
    ) -> tuple[list[str], list[PriorSession]]:
        """The note's stored digests and the eye's other sessions (see Store)."""
        hashes_sql, earlier_sql = self._sql["hashes"], self._sql["eye_sessions"]
        params = {"patient_system": patient[0], "patient_value": patient[1], "eye": eye}

        def work(connection: sqlite3.Connection) -> tuple[list[str], list[PriorSession]]:
            hashes = [digest for (digest,) in _all(connection, hashes_sql, {"key": key})]
            return hashes, sessions_from_rows(key, _all(connection, earlier_sql, params))

        return await self._run(work)

    async def write_many(self, versions: Sequence[NewVersion], *, forward: bool) -> None:
        """Store the versions all or nothing (see Store), in the next group commit."""
        steps = [step for v in versions for step in self._steps(v, forward=forward)]
        loop = asyncio.get_running_loop()
        done: asyncio.Future[None] = loop.create_future()
        self._waiting.append((steps, done))
        if len(self._waiting) == 1:
            # Every write that arrives before the loop comes round joins this commit.
            loop.call_soon(self._commit_waiting)
        await done

    async def write_all(
        self,
        steps: Sequence[tuple[str, dict[str, Any]]],
        versions: Sequence[NewVersion] = (),
        *,
        forward: bool = False,
    ) -> None:
        """Run the named statements and store the versions all or nothing, in the next group
        commit (see Store)."""
        planned = [step for v in versions for step in self._steps(v, forward=forward)]
        planned += [(self._sql[name], params) for name, params in steps]
        loop = asyncio.get_running_loop()
        done: asyncio.Future[None] = loop.create_future()
        self._waiting.append((planned, done))
        if len(self._waiting) == 1:
            loop.call_soon(self._commit_waiting)
        await done

    def _commit_waiting(self) -> None:
        batch, self._waiting = self._waiting, []
        task = asyncio.ensure_future(self._group_commit(batch))
        self._commits.add(task)
        task.add_done_callback(self._commits.discard)

    async def _group_commit(self, batch: list[_Write]) -> None:
        """One transaction for every waiting write, each in a savepoint of its own: a write
        whose version another writer stored first rolls back alone (DuplicateVersionError
        for its caller); the others commit together. A commit is what a write costs on
        SQLite, so under load one per loop turn serves many submissions."""

        def work(connection: sqlite3.Connection) -> list[Exception | None]:
            # IMMEDIATE: the write lock is taken here or not at all, so a busy database is
            # met before anything is written and the whole batch can be retried.
            connection.execute("BEGIN IMMEDIATE")
            outcomes: list[Exception | None] = []
            try:
                for steps, _done in batch:
                    connection.execute("SAVEPOINT one_write")
                    try:
                        for sql, params in steps:
                            if isinstance(params, list):
                                connection.executemany(sql.text, [sql.params(p) for p in params])
                            else:
                                connection.execute(sql.text, sql.params(params))
                    except sqlite3.IntegrityError as exc:
                        connection.execute("ROLLBACK TO one_write")
                        duplicate = DuplicateVersionError()
                        duplicate.__cause__ = exc
                        outcomes.append(duplicate)
                    else:
                        outcomes.append(None)
                    connection.execute("RELEASE one_write")
                connection.execute("COMMIT")
            except BaseException:
                if connection.in_transaction:
                    connection.rollback()
                raise
            return outcomes

        try:
            outcomes = await self._run(work)
        except BaseException as exc:  # nothing was stored: every caller hears why
            for _steps, done in batch:
                if not done.done():
                    done.set_exception(exc)
            if not isinstance(exc, Exception):
                raise
            return
        for (_steps, done), outcome in zip(batch, outcomes, strict=True):
            if done.done():  # its caller went away; the write stands, as any committed one
                continue
            if outcome is None:
                done.set_result(None)
            else:
                done.set_exception(outcome)

    def _steps(self, new: NewVersion, *, forward: bool) -> list[tuple[Sql, Any]]:
        """The statements (and their parameters) that store one version."""
        row, sql = new.row, self._sql
        version = {name: getattr(row, name) for name in VERSION_COLUMNS}
        version["started_at"] = _moment(row.started_at)
        version["recorded_at"] = _moment(row.recorded_at)
        version["signed_at"] = None if row.signed_at is None else _moment(row.signed_at)
        steps: list[tuple[Sql, Any]] = [(sql["add_version"], version)]  # the constraint first
        if row.version > 1:
            steps.append((sql["retire"], {"key": row.note_key}))
        if new.index:
            # A note's resources share a handful of times: each is formatted once.
            times: dict[datetime, str] = {}

            def text(moment: datetime | None) -> str | None:
                if moment is None:
                    return None
                done = times.get(moment)
                if done is None:
                    done = times[moment] = _moment(moment)
                return done

            rows = [
                {
                    "note_key": row.note_key,
                    "role": i.role,
                    "version": row.version,
                    "resource_type": i.resource_type,
                    "status": i.status,
                    "date": text(i.date),
                    "date_end": text(i.date_end),
                    "sort_at": text(i.sort_at),
                }
                for i in new.index
            ]
            steps.append((sql["add_index"], rows))
            tokens = [
                {
                    "note_key": row.note_key,
                    "version": row.version,
                    "role": i.role,
                    "param": param,
                    "system": system,
                    "code": code,
                }
                for i in new.index
                for param, system, code in i.tokens
            ]
            if tokens:
                steps.append((sql["add_search_tokens"], tokens))
        steps.append(
            (sql["add_audit"], audit_params(new.audit, row.note_key, row.version, _moment))
        )
        if forward:
            at = _moment(row.recorded_at)
            steps.append(
                (sql["add_outbox"], {"note_key": row.note_key, "version": row.version, "at": at})
            )
        return steps


class Checkpointer:
    """Copies SQLite's write-ahead log into the database file from a thread of its own.

    With automatic checkpoints, the commit that crosses the threshold copies every page and
    syncs the file, stalling its request (and, on the event loop, every other) for
    milliseconds. Here a passive checkpoint, which never blocks writers, runs a few times a
    second; a page written many times in between is copied once. Under steady writing a
    passive checkpoint never catches the log's end, so the log would grow without bound:
    once it holds RESTART_FRAMES, a restarting checkpoint takes the write lock for the
    little that is left (writers await it: see SqliteStore._run) and the log starts over.

    That restart holds the write lock through the database file's sync, one stall of tens
    of milliseconds for every writer, and it set the tail of POST /notes under load. So it
    waits for a lull: it runs once the log holds RESTART_FRAMES and no frame was added for
    one interval, and only at HARD_FRAMES (a log of about 256 MB) in the middle of writing.
    The figures behind the choice are in bench/results and README, "Performance".
    """

    INTERVAL_S = 0.2
    RESTART_FRAMES = 16_000
    HARD_FRAMES = 64_000

    def __init__(self, path: str) -> None:
        self.path = path
        self._seen = -1  # the log's frames at the last look
        self._restarted = -1  # the log's frames when it was last restarted
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
            still = frames == self._seen  # nothing written since the last look
            self._seen = frames
            if frames >= self.HARD_FRAMES or (
                frames >= self.RESTART_FRAMES and still and frames != self._restarted
            ):
                connection.execute("PRAGMA wal_checkpoint(RESTART)").fetchone()
                # The log starts over with the next write; until then its size reads the
                # same, and restarting it again would only sync for nothing.
                self._restarted = frames
        except sqlite3.Error as exc:  # a checkpoint that fails is retried by the next one
            log.warning("WAL checkpoint skipped: %s", type(exc).__name__)


def _moment(moment: datetime) -> str:
    """A time as SQLAlchemy keeps it in SQLite (UTC, text), so the ORM reads it back."""
    return moment.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S.%f")


def _locked(exc: sqlite3.OperationalError) -> bool:
    text = str(exc)
    return "locked" in text or "busy" in text


def _all(connection: sqlite3.Connection, sql: Sql, params: dict[str, Any]) -> list[Any]:
    """Every row of a query. Every row is fetched: a statement left unfinished keeps its read
    snapshot, which stops checkpoints there and keeps the log from ever starting over."""
    return connection.execute(sql.text, sql.params(params)).fetchall()
