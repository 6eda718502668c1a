"""The store on PostgreSQL: asynchronous psycopg on a pool, one statement per call.

Every call is one statement and so one round trip, awaited on the event loop (no thread
hop): psycopg spends more of the request's time per statement than the server does, so
a submission's two reads are one statement, and its write (the version, its search rows,
the previous version's search rows retired, its audit entry, its outbox entry) is one
statement of data-modifying CTEs, which PostgreSQL applies atomically (PostgreSQL 15
manual, 7.8.4 "Data-Modifying Statements in WITH"). The statements are written out for
PostgreSQL here; the tables they name are those of capnote.store.tables, and the tests run
every call against a real server.
"""

from __future__ import annotations

import asyncio
from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any

import psycopg
from psycopg_pool import AsyncConnectionPool, PoolTimeout
from sqlalchemy.dialects.postgresql import psycopg as pg_dialect
from sqlalchemy.engine import make_url

from capnote.derive import PriorSession
from capnote.errors import UnavailableError
from capnote.findings import unstorable
from capnote.store.base import (
    VERSION_COLUMNS,
    DuplicateVersionError,
    NewVersion,
    Sql,
    Store,
    sessions_from_rows,
)

# Connections per process: enough for the requests one event loop has in flight.
POOL_SIZE = 8
# How long a call waits for a connection (the database down, or every one busy) before 503.
POOL_WAIT_S = 5.0

# A submission's reads in one statement: the note's stored digests ('hash' rows) and the
# latest versions of the patient's other notes on this eye earlier and later ('session'
# rows; a note amended onto another patient counts under its newest one).
_BEFORE_WRITE = """
SELECT 'hash', content_hash, NULL::timestamptz, NULL::float8, NULL::varchar
FROM note_version WHERE note_key = %(key)s
UNION ALL
(SELECT 'session', v.note_key, v.started_at, v.total_energy_mj, v.status
 FROM note_version v
 JOIN (SELECT note_key, max(version) AS newest FROM note_version
       WHERE patient_system = %(patient_system)s AND patient_value = %(patient_value)s
       GROUP BY note_key) n
   ON v.note_key = n.note_key AND v.version = n.newest
 WHERE v.eye = %(eye)s
 ORDER BY v.started_at, v.note_key
 LIMIT 10000)
"""


def _write_statement(retire: bool, forward: bool) -> str:
    """The one statement that stores a version (see the module docstring)."""
    columns = ", ".join(VERSION_COLUMNS)
    values = ", ".join(f"%({name})s" for name in VERSION_COLUMNS)
    parts = [
        # Column names from VersionRow, values as bound parameters: no input reaches the text.
        f"v AS (INSERT INTO note_version ({columns}) VALUES ({values}))",  # noqa: S608
        # Every sub-statement sees the table as it was before the statement, so this retires
        # the previous version's rows and never the ones inserted beside it.
        "r AS (UPDATE fhir_index SET latest = false WHERE note_key = %(note_key)s AND latest)"
        if retire
        else "",
        "i AS (INSERT INTO fhir_index (note_key, role, version, resource_type, latest, status,"
        " date, date_end, sort_at) SELECT %(note_key)s, x.role, %(version)s, x.kind, true,"
        " x.status, x.date, x.date_end, x.sort_at"
        " FROM unnest(%(index_roles)s::varchar[], %(index_kinds)s::varchar[],"
        " %(index_statuses)s::varchar[], %(index_dates)s::timestamptz[],"
        " %(index_ends)s::timestamptz[], %(index_sorts)s::timestamptz[])"
        " AS x(role, kind, status, date, date_end, sort_at))",
        "t AS (INSERT INTO fhir_token (note_key, version, role, param, system, code)"
        " SELECT %(note_key)s, %(version)s, x.role, x.param, x.system, x.code"
        " FROM unnest(%(token_roles)s::varchar[], %(token_params)s::varchar[],"
        " %(token_systems)s::varchar[], %(token_codes)s::varchar[])"
        " AS x(role, param, system, code))",
        "a AS (INSERT INTO audit_entry (at, actor, role, action, note_key, version, remote,"
        " outcome, token_id, detail) VALUES (%(audit_at)s, %(audit_actor)s, %(audit_role)s,"
        " %(audit_action)s, %(note_key)s, %(version)s, %(audit_remote)s, 'ok',"
        " %(audit_token_id)s, %(audit_detail)s))",
        "o AS (INSERT INTO outbox_entry (note_key, version, state, attempts, next_attempt_at,"
        " created_at) VALUES (%(note_key)s, %(version)s, 'pending', 0, %(recorded_at)s,"
        " %(recorded_at)s))"
        if forward
        else "",
    ]
    return "WITH " + ", ".join(p for p in parts if p) + " SELECT 1"


_WRITES = {
    (retire, forward): _write_statement(retire, forward)
    for retire in (False, True)
    for forward in (False, True)
}


class PostgresStore(Store):
    """The store on one PostgreSQL database (see the module docstring)."""

    def __init__(self, url: str) -> None:
        super().__init__(pg_dialect.dialect())  # type: ignore[no-untyped-call]
        # libpq takes SQLAlchemy's URL once the driver name is dropped (host and port may
        # sit in its query, as for a socket directory).
        self._conninfo = (
            make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)
        )
        self._pool: AsyncConnectionPool[Any] | None = None
        self._loop: asyncio.AbstractEventLoop | None = None

    # -- the pool -----------------------------------------------------------------------------

    async def _connections(self) -> AsyncConnectionPool[Any]:
        loop = asyncio.get_running_loop()
        if self._pool is None:
            # Opened in the loop that first needs it: the pool's connections belong to it.
            pool: AsyncConnectionPool[Any] = AsyncConnectionPool(
                self._conninfo,
                min_size=1,
                max_size=POOL_SIZE,
                timeout=POOL_WAIT_S,
                open=False,
                # Reads need no BEGIN and COMMIT; a write is one statement (see write_many).
                kwargs={"autocommit": True},
            )
            await pool.open()
            self._pool, self._loop = pool, loop
        elif self._loop is not loop:
            raise RuntimeError("this store's connections belong to another event loop")
        return self._pool

    async def _rows(self, sql: str, params: dict[str, Any]) -> list[Any]:
        pool = await self._connections()
        try:
            async with pool.connection() as connection:
                cursor = await connection.execute(sql, params)
                return await cursor.fetchall() if cursor.description is not None else []
        except (PoolTimeout, psycopg.OperationalError) as exc:
            raise UnavailableError("the database is not reachable right now") from exc
        except psycopg.errors.ReadOnlySqlTransaction as exc:
            raise UnavailableError(_READ_ONLY) from exc
        except psycopg.DataError as exc:  # a NUL byte in a search, say: the caller's error
            raise unstorable() from exc

    async def writable(self) -> bool:
        """The server takes writes: not a standby, not set to read-only transactions."""
        rows = await self._rows("SHOW transaction_read_only", {})
        return bool(rows) and rows[0][0] == "off"

    async def start(self) -> None:
        """Open the pool in the service's loop."""
        await self._connections()

    async def aclose(self) -> None:
        """Close the pool and its connections."""
        if self._pool is not None:
            await self._pool.close()
            self._pool = self._loop = None

    # -- the operations -----------------------------------------------------------------------

    async def _fetch(self, sql: Sql, params: dict[str, Any]) -> list[Any]:
        return await self._rows(sql.text, sql.params(params))

    def _time(self, moment: datetime) -> datetime:
        return moment.astimezone(UTC)

    async def before_write(
        self, key: str, patient: tuple[str, str], eye: str
    ) -> tuple[list[str], list[PriorSession]]:
        """The note's stored digests and the eye's other sessions, in one statement."""
        params = {"key": key, "patient_system": patient[0], "patient_value": patient[1], "eye": eye}
        rows = await self._rows(_BEFORE_WRITE, params)
        hashes = [row[1] for row in rows if row[0] == "hash"]
        return hashes, sessions_from_rows(key, [row[1:] for row in rows if row[0] == "session"])

    async def write_many(self, versions: Sequence[NewVersion], *, forward: bool) -> None:
        """Store the versions: one statement each, in one transaction when several."""
        statements = [(_WRITES[(v.row.version > 1, forward)], _write_params(v)) for v in versions]
        await self._write(statements)

    async def write_all(
        self,
        steps: Sequence[tuple[str, dict[str, Any]]],
        versions: Sequence[NewVersion] = (),
        *,
        forward: bool = False,
    ) -> None:
        """Run the named statements and store the versions in one transaction (see Store)."""
        statements = [(_WRITES[(v.row.version > 1, forward)], _write_params(v)) for v in versions]
        statements += [(self._sql[n].text, self._sql[n].params(p)) for n, p in steps]
        await self._write(statements)

    async def _write(self, statements: Sequence[tuple[str, dict[str, Any]]]) -> None:
        """Run statements in one transaction (one alone needs none), driver errors mapped."""
        pool = await self._connections()
        try:
            async with pool.connection() as connection:
                if len(statements) == 1:  # a statement is atomic by itself: no BEGIN/COMMIT
                    await connection.execute(*statements[0])
                    return
                async with connection.transaction():
                    for sql, params in statements:
                        await connection.execute(sql, params)
        except psycopg.errors.UniqueViolation as exc:
            raise DuplicateVersionError from exc
        except (PoolTimeout, psycopg.OperationalError) as exc:
            raise UnavailableError("the database is not reachable right now") from exc
        except psycopg.errors.ReadOnlySqlTransaction as exc:
            # A standby after a failover, or the server set read-only: nothing was written.
            raise UnavailableError(_READ_ONLY) from exc
        except psycopg.DataError as exc:
            raise unstorable() from exc


_READ_ONLY = "the database accepts no writes right now (read-only); retry later"


def _write_params(new: NewVersion) -> dict[str, Any]:
    row, audit = new.row, new.audit
    params: dict[str, Any] = {name: getattr(row, name) for name in VERSION_COLUMNS}
    params["started_at"] = row.started_at.astimezone(UTC)
    params["recorded_at"] = row.recorded_at.astimezone(UTC)
    params["signed_at"] = None if row.signed_at is None else row.signed_at.astimezone(UTC)
    params["index_roles"] = [i.role for i in new.index]
    params["index_kinds"] = [i.resource_type for i in new.index]
    params["index_statuses"] = [i.status for i in new.index]
    params["index_dates"] = [None if i.date is None else i.date.astimezone(UTC) for i in new.index]
    params["index_ends"] = [
        None if i.date_end is None else i.date_end.astimezone(UTC) for i in new.index
    ]
    params["index_sorts"] = [i.sort_at.astimezone(UTC) for i in new.index]
    tokens = [(i.role, *t) for i in new.index for t in i.tokens]
    params["token_roles"] = [t[0] for t in tokens]
    params["token_params"] = [t[1] for t in tokens]
    params["token_systems"] = [t[2] for t in tokens]
    params["token_codes"] = [t[3] for t in tokens]
    params["audit_at"] = audit.at.astimezone(UTC)
    params["audit_actor"] = audit.actor
    params["audit_role"] = audit.role
    params["audit_action"] = audit.action
    params["audit_remote"] = audit.remote
    params["audit_token_id"] = audit.token_id
    params["audit_detail"] = audit.detail
    return params
