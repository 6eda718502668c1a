"""The request path's reads and writes, on the database driver's own connections.

Every submission asks the same few things of the store: the token, whether the note is
already there, the eye's earlier sessions, and one transaction that adds the version, its
search rows, its audit entry and its outbox entry. Through the ORM these cost more than
the clinical work itself, so a Ledger runs them as statements prepared once, on the
driver's connection. Everything else (listings, searches, tokens on the command line, the
outbox worker) stays on SQLAlchemy sessions (service.store.repository, service.store.outbox).

One interface, an implementation per engine (service.store.database.open_ledger):

- SqliteLedger (ledger_sqlite.py): statements take microseconds, so they run on the event
  loop itself, on one connection per process; a writer that meets another process's write
  lock awaits a short back-off instead of sleeping in SQLite's busy handler, and WAL
  checkpoints run in a thread of their own.
- PostgresLedger (ledger_pg.py): asynchronous psycopg on a pool; a submission's reads are
  one statement and its write is one statement, so each is one round trip and the loop
  never waits on the network.

Uniqueness and idempotency rest on the database: (note_key, version) is unique, and a
second writer of the same version gets DuplicateVersionError.
"""

from __future__ import annotations

import hmac
from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import and_, bindparam, func, insert, select, update
from sqlalchemy.engine import Dialect
from sqlalchemy.sql import ClauseElement

from service.derive import PriorSession
from service.store.tables import ApiToken, AuditEntry, FhirIndex, NoteVersion, OutboxEntry

_NOTE = NoteVersion.__table__  # type: ignore[attr-defined]
_INDEX = FhirIndex.__table__  # type: ignore[attr-defined]
_AUDIT = AuditEntry.__table__  # type: ignore[attr-defined]
_OUTBOX = OutboxEntry.__table__  # type: ignore[attr-defined]
_TOKEN = ApiToken.__table__  # type: ignore[attr-defined]


class DuplicateVersionError(Exception):
    """Another writer stored this (note, version) first."""


@dataclass(frozen=True, slots=True)
class TokenRow:
    """A live token's label and role."""

    label: str
    role: str


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


VERSION_COLUMNS = tuple(VersionRow.__slots__)


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
STATEMENTS: dict[str, ClauseElement] = {
    "token": select(_TOKEN.c.token_hash, _TOKEN.c.label, _TOKEN.c.role, _TOKEN.c.revoked_at).where(
        _TOKEN.c.token_hash == bindparam("digest")
    ),
    "hashes": select(_NOTE.c.content_hash)
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version),
    # Latest versions of the patient's notes on this eye, earlier and later: the inputs to
    # cumulative energy, and the later sessions whose totals a new or changed session moves
    # (a note amended onto another patient counts under its newest one).
    "eye_sessions": select(
        _NOTE.c.note_key, _NOTE.c.started_at, _NOTE.c.total_energy_mj, _NOTE.c.status
    )
    .join(
        _newest_of_patient,
        and_(
            _NOTE.c.note_key == _newest_of_patient.c.note_key,
            _NOTE.c.version == _newest_of_patient.c.v,
        ),
    )
    .where(_NOTE.c.eye == bindparam("eye"))
    .order_by(_NOTE.c.started_at, _NOTE.c.note_key)
    .limit(10_000),
    "latest": select(*(_NOTE.c[name] for name in VERSION_COLUMNS))
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version.desc())
    .limit(1),
    "version": select(*(_NOTE.c[name] for name in VERSION_COLUMNS)).where(
        _NOTE.c.note_key == bindparam("key"), _NOTE.c.version == bindparam("version")
    ),
    "versions": select(*(_NOTE.c[name] for name in VERSION_COLUMNS))
    .where(_NOTE.c.note_key == bindparam("key"))
    .order_by(_NOTE.c.version),
    "add_version": insert(_NOTE)
    .inline()
    .values({name: bindparam(name) for name in VERSION_COLUMNS}),
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
class Sql:
    """A statement's text for one dialect, and the values it was written with (limits,
    constant column values), which every execution passes along with its own."""

    text: str
    constants: dict[str, Any]

    def params(self, values: dict[str, Any]) -> dict[str, Any]:
        """The parameters for one execution."""
        return {**self.constants, **values}


def compiled(dialect: Dialect) -> dict[str, Sql]:
    """Every statement's SQL for this dialect, with named parameters."""
    out = {}
    for name, statement in STATEMENTS.items():
        compiled = statement.compile(dialect=dialect)
        constants = {k: v for k, v in compiled.params.items() if v is not None}
        out[name] = Sql(str(compiled), constants)
    return out


# --- the interface ---------------------------------------------------------------------------


class Ledger(ABC):
    """The request path's store operations for one database (see the module docstring)."""

    @abstractmethod
    async def start(self) -> None:
        """Get ready to serve (the service calls this on start; calls work without it)."""

    @abstractmethod
    async def aclose(self) -> None:
        """Stop background work and close every connection."""

    @abstractmethod
    async def token(self, digest: str) -> TokenRow | None:
        """The live token with this SHA-256 digest, or None."""

    @abstractmethod
    async def before_write(
        self, key: str, patient: tuple[str, str], eye: str
    ) -> tuple[list[str], list[PriorSession]]:
        """For a submission: the content digests of the note's stored versions (none for a
        new note) and the eye's other sessions, earlier and later, in session order
        (excluding this note and voided ones)."""

    async def eye_sessions(
        self, key: str, patient: tuple[str, str], eye: str
    ) -> list[PriorSession]:
        """The eye's other sessions (see before_write); for amendments and voids."""
        _hashes, sessions = await self.before_write(key, patient, eye)
        return sessions

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

    @abstractmethod
    async def _versions(self, statement: str, params: dict[str, Any]) -> list[VersionRow]:
        """The rows of one of the version statements ("latest", "version", "versions")."""

    @abstractmethod
    async def write_many(self, versions: Sequence[NewVersion], *, forward: bool) -> None:
        """Add each version, its search rows (retiring the note's previous ones), its audit
        entry and, when forwarding, its outbox entry, all or nothing. DuplicateVersionError
        when another writer stored one of these versions first."""


def token_row(row: Sequence[Any] | None, digest: str) -> TokenRow | None:
    """A live token from (token_hash, label, role, revoked_at), or None."""
    # The hash is compared once more in constant time, though the lookup already matched it.
    if row is None or row[3] is not None or not hmac.compare_digest(row[0], digest):
        return None
    return TokenRow(label=row[1], role=row[2])


def sessions_from_rows(key: str, rows: Sequence[Sequence[Any]]) -> list[PriorSession]:
    """PriorSession from (note_key, started_at, total_energy_mj, status) rows, leaving out
    the note itself and voided notes."""
    return [
        PriorSession(read_moment(started), energy or 0.0, k)
        for k, started, energy, status in rows
        if k != key and status != "void"
    ]


def read_moment(value: Any) -> datetime:
    """An aware UTC time from what a driver returned (SQLite: SQLAlchemy's text form)."""
    moment = datetime.fromisoformat(value) if isinstance(value, str) else value
    assert isinstance(moment, datetime)
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def version_row(row: Sequence[Any]) -> VersionRow:
    """A VersionRow from a row of VERSION_COLUMNS, as either driver returns it."""
    values = dict(zip(VERSION_COLUMNS, row, strict=True))
    values["started_at"] = read_moment(values["started_at"])
    values["recorded_at"] = read_moment(values["recorded_at"])
    values["bundle"] = bytes(values["bundle"])
    return VersionRow(**values)
