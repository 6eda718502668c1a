"""The store: one interface over SQLite and PostgreSQL for everything capnote keeps.

Notes and their versions, the search index, listings and FHIR searches, tokens, the audit
trail and the outbox are all reached through Store, and every statement is defined once
here, against the table definitions (capnote.store.tables), as SQLAlchemy Core. Each driver
compiles them for its dialect once and runs them on the database driver's own connections:
through the ORM these cost more than the clinical work itself.

- SqliteStore (sqlite.py): statements take microseconds, so they run on the event loop
  itself, on one connection per process; a writer that meets another process's write lock
  awaits a short back-off instead of sleeping in SQLite's busy handler, and WAL checkpoints
  run in a thread of their own.
- PostgresStore (postgres.py): asynchronous psycopg on one pool per process; a submission's
  reads are one statement and its write is one statement, so each is one round trip and the
  loop never waits on the network.

Uniqueness and idempotency rest on the database: (note_key, version) is unique, and a
second writer of the same version gets DuplicateVersionError. Driver errors become
UnavailableError (capnote.errors); times go in and come out as aware UTC (read_moment).
"""

from __future__ import annotations

import hmac
from abc import ABC, abstractmethod
from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields
from datetime import UTC, datetime, timedelta
from typing import Any, TypeVar

from sqlalchemy import (
    Integer,
    and_,
    bindparam,
    func,
    insert,
    literal,
    null,
    or_,
    select,
    update,
)
from sqlalchemy.engine import Dialect
from sqlalchemy.sql import ClauseElement

from capnote.derive import PriorSession
from capnote.fhir.readmodel import Searchable
from capnote.store.tables import ApiToken, AuditEntry, FhirIndex, NoteVersion, OutboxEntry
from capnote.tokens import hash_token, new_secret

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
    bundle: bytes  # compressed (capnote.store.codec)
    roles: str  # packed (capnote.store.codec)
    reason: str | None
    recorded_at: datetime
    recorded_by: str


VERSION_COLUMNS = tuple(VersionRow.__slots__)


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
    index: tuple[Searchable, ...]
    audit: AuditRow


@dataclass(frozen=True, slots=True)
class TokenInfo:
    """A token as the operator lists it (never the token itself)."""

    id: int
    label: str
    role: str
    created_at: datetime
    revoked_at: datetime | None


@dataclass(frozen=True, slots=True)
class AuditRecord:
    """One entry of the audit trail."""

    id: int
    at: datetime
    actor: str
    role: str
    action: str
    note_key: str | None
    version: int | None
    remote: str | None
    outcome: str


@dataclass(frozen=True, slots=True)
class OutboxRow:
    """One outbox entry: a stored version's Bundle waiting for (or done with) delivery."""

    id: int
    note_key: str
    version: int
    state: str
    attempts: int
    next_attempt_at: datetime
    claimed_by: str | None
    claimed_until: datetime | None
    last_status: int | None
    last_error: str | None
    created_at: datetime
    delivered_at: datetime | None


@dataclass(frozen=True, slots=True)
class Found:
    """A search hit: which resource of which stored version."""

    role: str
    note_key: str
    version: int
    recorded_at: datetime
    bundle: bytes  # compressed, as stored
    roles: str


R = TypeVar("R", TokenInfo, AuditRecord, OutboxRow)


def _as(kind: type[R], rows: Sequence[Sequence[Any]]) -> list[R]:
    """Rows of a statement over kind's columns as kind, times read as aware UTC."""
    times = {f.name for f in fields(kind) if f.name.endswith("_at") or f.name == "at"}
    names = [f.name for f in fields(kind)]
    out = []
    for row in rows:
        values: dict[str, Any] = {
            name: (read_moment(v) if name in times and v is not None else v)
            for name, v in zip(names, row, strict=True)
        }
        out.append(kind(**values))
    return out


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


TOKEN_COLUMNS = ("id", "label", "role", "created_at", "revoked_at")
AUDIT_COLUMNS = ("id", "at", "actor", "role", "action", "note_key", "version", "remote", "outcome")
OUTBOX_COLUMNS = (
    "id",
    "note_key",
    "version",
    "state",
    "attempts",
    "next_attempt_at",
    "claimed_by",
    "claimed_until",
    "last_status",
    "last_error",
    "created_at",
    "delivered_at",
)
PENDING, DELIVERING, DELIVERED, FAILED = "pending", "delivering", "delivered", "failed"

# An outbox entry is due when it waits for its time, or its worker's lease ran out.
_due = or_(
    and_(_OUTBOX.c.state == PENDING, _OUTBOX.c.next_attempt_at <= bindparam("now")),
    and_(_OUTBOX.c.state == DELIVERING, _OUTBOX.c.claimed_until < bindparam("now")),
)
_held = and_(
    _OUTBOX.c.id == bindparam("entry_id"),
    _OUTBOX.c.claimed_by == bindparam("worker"),
    _OUTBOX.c.state == DELIVERING,
)
_released = {"claimed_by": null(), "claimed_until": null()}
_outbox_out = tuple(_OUTBOX.c[name] for name in OUTBOX_COLUMNS)

STATEMENTS.update(
    {
        "ping": select(literal(1)),
        "note_exists": select(_NOTE.c.note_key)
        .where(_NOTE.c.note_key == bindparam("key"))
        .limit(1),
        "add_token": insert(_TOKEN)
        .values({name: bindparam(name) for name in ("token_hash", "role", "label", "created_at")})
        .returning(_TOKEN.c.id),
        "tokens": select(*(_TOKEN.c[name] for name in TOKEN_COLUMNS)).order_by(_TOKEN.c.id),
        "revoke_token": update(_TOKEN)
        .where(_TOKEN.c.id == bindparam("token_id"), _TOKEN.c.revoked_at.is_(None))
        .values(revoked_at=bindparam("at"))
        .returning(_TOKEN.c.id),
        "audit_all": select(*(_AUDIT.c[name] for name in AUDIT_COLUMNS))
        .order_by(_AUDIT.c.id.desc())
        .offset(bindparam("offset", type_=Integer))
        .limit(bindparam("limit", type_=Integer)),
        "audit_of_note": select(*(_AUDIT.c[name] for name in AUDIT_COLUMNS))
        .where(_AUDIT.c.note_key == bindparam("key"))
        .order_by(_AUDIT.c.id.desc())
        .offset(bindparam("offset", type_=Integer))
        .limit(bindparam("limit", type_=Integer)),
        # Claimed in one statement: the candidates are locked and skipped by other workers
        # on PostgreSQL (FOR UPDATE SKIP LOCKED; SQLite has one writer at a time anyway), and
        # the due condition is checked again on the row itself, so no two workers hold one.
        "claim": update(_OUTBOX)
        .where(
            _OUTBOX.c.id.in_(
                select(_OUTBOX.c.id)
                .where(_due)
                .order_by(_OUTBOX.c.id)
                .limit(bindparam("limit", type_=Integer))
                .with_for_update(skip_locked=True)
            ),
            _due,
        )
        .values(
            state=DELIVERING,
            claimed_by=bindparam("worker"),
            claimed_until=bindparam("until"),
            attempts=_OUTBOX.c.attempts + 1,
        )
        .returning(*_outbox_out),
        "bundle_of": select(_NOTE.c.bundle).where(
            _NOTE.c.note_key == bindparam("key"), _NOTE.c.version == bindparam("version")
        ),
        "delivered": update(_OUTBOX)
        .where(_held)
        .values(
            state=DELIVERED,
            last_status=bindparam("status"),
            last_error=null(),
            delivered_at=bindparam("at"),
            **_released,
        )
        .returning(_OUTBOX.c.id),
        "retry_later": update(_OUTBOX)
        .where(_held)
        .values(
            state=PENDING,
            last_status=bindparam("status"),
            last_error=bindparam("error"),
            next_attempt_at=bindparam("at"),
            **_released,
        )
        .returning(_OUTBOX.c.id),
        "park": update(_OUTBOX)
        .where(_held)
        .values(
            state=FAILED,
            last_status=bindparam("status"),
            last_error=bindparam("error"),
            **_released,
        )
        .returning(_OUTBOX.c.id),
        "outbox_of_note": select(*_outbox_out)
        .where(_OUTBOX.c.note_key == bindparam("key"))
        .order_by(_OUTBOX.c.version),
        "outbox_all": select(*_outbox_out)
        .order_by(_OUTBOX.c.id.desc())
        .limit(bindparam("limit", type_=Integer)),
        "outbox_in_state": select(*_outbox_out)
        .where(_OUTBOX.c.state == bindparam("state"))
        .order_by(_OUTBOX.c.id.desc())
        .limit(bindparam("limit", type_=Integer)),
        # An operator's retry (back to pending, due now) or park; never a delivered entry.
        "operator_retry": update(_OUTBOX)
        .where(_OUTBOX.c.id == bindparam("entry_id"), _OUTBOX.c.state != DELIVERED)
        .values(state=PENDING, next_attempt_at=bindparam("at"), **_released)
        .returning(_OUTBOX.c.id),
        "operator_park": update(_OUTBOX)
        .where(_OUTBOX.c.id == bindparam("entry_id"), _OUTBOX.c.state != DELIVERED)
        .values(state=FAILED, **_released)
        .returning(_OUTBOX.c.id),
    }
)


def _listing(eye: bool, start: bool, end: bool, count: bool) -> ClauseElement:
    """The latest version of each note of a patient, optionally one eye and a date range.

    The newest version is taken over all of a note's versions before the patient filter,
    so a note amended onto another patient no longer shows (or counts) under the first."""
    of_patient = select(_NOTE.c.note_key).where(
        _NOTE.c.patient_system == bindparam("patient_system"),
        _NOTE.c.patient_value == bindparam("patient_value"),
    )
    newest = (
        select(_NOTE.c.note_key, func.max(_NOTE.c.version).label("v"))
        .where(_NOTE.c.note_key.in_(of_patient))
        .group_by(_NOTE.c.note_key)
        .subquery()
    )
    conditions = [
        _NOTE.c.patient_system == bindparam("patient_system"),
        _NOTE.c.patient_value == bindparam("patient_value"),
    ]
    if eye:
        conditions.append(_NOTE.c.eye == bindparam("eye"))
    if start:
        conditions.append(_NOTE.c.started_at >= bindparam("start"))
    if end:
        conditions.append(_NOTE.c.started_at < bindparam("end"))
    joined = _NOTE.join(
        newest, and_(_NOTE.c.note_key == newest.c.note_key, _NOTE.c.version == newest.c.v)
    )
    if count:
        return select(func.count()).select_from(joined).where(*conditions)
    return (
        select(*(_NOTE.c[name] for name in VERSION_COLUMNS))
        .select_from(joined)
        .where(*conditions)
        .order_by(_NOTE.c.started_at, _NOTE.c.note_key)
        .offset(bindparam("offset", type_=Integer))
        .limit(bindparam("limit", type_=Integer))
    )


def _search(
    patient: bool, status: bool, after: str | None, before: str | None, count: bool
) -> ClauseElement:
    """Current resources of one type, by patient, status and a date range (after: "ge" or
    "gt"; before: "le" or "lt"), with the stored version each is read from."""
    conditions = [_INDEX.c.resource_type == bindparam("kind"), _INDEX.c.latest.is_(True)]
    if patient:
        conditions += [
            _NOTE.c.patient_system == bindparam("patient_system"),
            _NOTE.c.patient_value == bindparam("patient_value"),
        ]
    if status:
        conditions.append(_INDEX.c.status == bindparam("status"))
    if after is not None:
        low: Any = bindparam("after")
        conditions.append(_INDEX.c.date >= low if after == "ge" else _INDEX.c.date > low)
    if before is not None:
        high: Any = bindparam("before")
        conditions.append(_INDEX.c.date <= high if before == "le" else _INDEX.c.date < high)
    joined = _INDEX.join(
        _NOTE, and_(_NOTE.c.note_key == _INDEX.c.note_key, _NOTE.c.version == _INDEX.c.version)
    )
    if count:
        return select(func.count()).select_from(joined).where(*conditions)
    return (
        select(
            _INDEX.c.role,
            _INDEX.c.note_key,
            _INDEX.c.version,
            _NOTE.c.recorded_at,
            _NOTE.c.bundle,
            _NOTE.c.roles,
        )
        .select_from(joined)
        .where(*conditions)
        .order_by(_INDEX.c.date, _INDEX.c.note_key, _INDEX.c.role)
        .offset(bindparam("offset", type_=Integer))
        .limit(bindparam("limit", type_=Integer))
    )


@dataclass(frozen=True, slots=True)
class Sql:
    """A statement's text for one dialect, and the values it was written with (limits,
    constant column values), which every execution passes along with its own."""

    text: str
    constants: dict[str, Any]

    def params(self, values: dict[str, Any]) -> dict[str, Any]:
        """The parameters for one execution."""
        return {**self.constants, **values}


def compile_one(statement: ClauseElement, dialect: Dialect) -> Sql:
    """One statement's SQL for this dialect, with named parameters."""
    done = statement.compile(dialect=dialect)
    constants = {k: v for k, v in done.params.items() if v is not None}
    return Sql(str(done), constants)


def compiled(dialect: Dialect) -> dict[str, Sql]:
    """Every fixed statement's SQL for this dialect."""
    return {name: compile_one(statement, dialect) for name, statement in STATEMENTS.items()}


# --- the interface ---------------------------------------------------------------------------


class Store(ABC):
    """Everything capnote keeps, on one database (see the module docstring).

    A driver implements its lifetime, _fetch (one statement, its rows), _time (a time as the
    driver binds it), before_write and write_many (the submission path, tuned per engine);
    every other operation is written here once, on those."""

    def __init__(self, dialect: Dialect) -> None:
        self._dialect = dialect
        self._sql = compiled(dialect)
        self._variants: dict[tuple[object, ...], Sql] = {}

    def _variant(self, key: tuple[object, ...], build: Callable[[], ClauseElement]) -> Sql:
        """A statement whose shape depends on which filters a call has, compiled once per
        shape (the values are always bound parameters)."""
        sql = self._variants.get(key)
        if sql is None:
            sql = self._variants[key] = compile_one(build(), self._dialect)
        return sql

    @abstractmethod
    async def _fetch(self, sql: Sql, params: dict[str, Any]) -> list[Any]:
        """Run one statement (a write commits by itself) and return its rows."""

    @abstractmethod
    def _time(self, moment: datetime) -> Any:
        """A time as this driver binds it."""

    async def ping(self) -> None:
        """UnavailableError when the database does not answer."""
        await self._fetch(self._sql["ping"], {})

    async def writable(self) -> bool:
        """Whether writes can succeed now, as far as the engine tells without writing."""
        return True

    @abstractmethod
    async def start(self) -> None:
        """Get ready to serve (the service calls this on start; calls work without it)."""

    @abstractmethod
    async def aclose(self) -> None:
        """Stop background work and close every connection."""

    async def token(self, digest: str) -> TokenRow | None:
        """The live token with this SHA-256 digest, or None."""
        rows = await self._fetch(self._sql["token"], {"digest": digest})
        return token_row(rows[0] if rows else None, digest)

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

    async def _versions(self, statement: str, params: dict[str, Any]) -> list[VersionRow]:
        """The rows of one of the version statements ("latest", "version", "versions")."""
        return [version_row(r) for r in await self._fetch(self._sql[statement], params)]

    @abstractmethod
    async def write_many(self, versions: Sequence[NewVersion], *, forward: bool) -> None:
        """Add each version, its search rows (retiring the note's previous ones), its audit
        entry and, when forwarding, its outbox entry, all or nothing. DuplicateVersionError
        when another writer stored one of these versions first."""

    # -- notes: listings and searches ----------------------------------------------------------

    async def note_exists(self, key: str) -> bool:
        """True when the note has any stored version."""
        return bool(await self._fetch(self._sql["note_exists"], {"key": key}))

    async def latest_per_note(
        self,
        patient: tuple[str, str],
        eye: str | None,
        start: datetime | None,
        end: datetime | None,
        offset: int,
        limit: int,
    ) -> tuple[int, list[VersionRow]]:
        """The latest version of each note of a patient (optionally one eye and a range of
        session starts), in session order, and how many there are in all."""
        shape = (eye is not None, start is not None, end is not None)
        params: dict[str, Any] = {"patient_system": patient[0], "patient_value": patient[1]}
        if eye is not None:
            params["eye"] = eye
        if start is not None:
            params["start"] = self._time(start)
        if end is not None:
            params["end"] = self._time(end)
        counted = self._variant(("listing", *shape, True), lambda: _listing(*shape, count=True))
        listed = self._variant(("listing", *shape, False), lambda: _listing(*shape, count=False))
        [(total,)] = await self._fetch(counted, params)
        rows = await self._fetch(listed, {**params, "offset": offset, "limit": limit})
        return int(total), [version_row(r) for r in rows]

    async def fhir_search(
        self,
        kind: str,
        *,
        patient: tuple[str, str] | None = None,
        status: str | None = None,
        after: tuple[str, datetime] | None = None,
        before: tuple[str, datetime] | None = None,
        offset: int = 0,
        limit: int = 50,
    ) -> tuple[int, list[Found]]:
        """Current resources of a searchable type by patient, status and a date range
        (after: ("ge" | "gt", time); before: ("le" | "lt", time)), with the stored version
        each is read from, and how many match in all.

        The patient is the one of the version the resource belongs to, so a note amended
        onto another patient is found under the new one only."""
        shape = (
            patient is not None,
            status is not None,
            None if after is None else after[0],
            None if before is None else before[0],
        )
        params: dict[str, Any] = {"kind": kind}
        if patient is not None:
            params["patient_system"], params["patient_value"] = patient
        if status is not None:
            params["status"] = status
        if after is not None:
            params["after"] = self._time(after[1])
        if before is not None:
            params["before"] = self._time(before[1])
        counted = self._variant(("search", *shape, True), lambda: _search(*shape, count=True))
        listed = self._variant(("search", *shape, False), lambda: _search(*shape, count=False))
        [(total,)] = await self._fetch(counted, params)
        rows = await self._fetch(listed, {**params, "offset": offset, "limit": limit})
        return int(total), [
            Found(role, key, version, read_moment(at), bytes(bundle), roles)
            for role, key, version, at, bundle, roles in rows
        ]

    # -- tokens ------------------------------------------------------------------------------

    async def new_token(self, role: str, label: str, now: datetime) -> tuple[str, int]:
        """Create a token: (the token, shown once and never stored; its id)."""
        token = new_secret()
        params = {
            "token_hash": hash_token(token),
            "role": role,
            "label": label,
            "created_at": self._time(now),
        }
        [(token_id,)] = await self._fetch(self._sql["add_token"], params)
        return token, int(token_id)

    async def tokens(self) -> list[TokenInfo]:
        """Every token, revoked ones included, oldest first."""
        return _as(TokenInfo, await self._fetch(self._sql["tokens"], {}))

    async def revoke_token(self, token_id: int, now: datetime) -> bool:
        """Mark a token revoked; False when there is no such live token."""
        params = {"token_id": token_id, "at": self._time(now)}
        return bool(await self._fetch(self._sql["revoke_token"], params))

    # -- the audit trail ---------------------------------------------------------------------

    async def audit_entries(
        self, note_key: str | None, offset: int, limit: int
    ) -> list[AuditRecord]:
        """Audit entries, newest first, optionally for one note."""
        page = {"offset": offset, "limit": limit}
        if note_key is None:
            rows = await self._fetch(self._sql["audit_all"], page)
        else:
            rows = await self._fetch(self._sql["audit_of_note"], {**page, "key": note_key})
        return _as(AuditRecord, rows)

    # -- the outbox --------------------------------------------------------------------------

    async def claim(
        self, worker: str, now: datetime, lease: timedelta, limit: int
    ) -> list[OutboxRow]:
        """Claim up to limit due entries for this worker, oldest first."""
        params = {
            "worker": worker,
            "now": self._time(now),
            "until": self._time(now + lease),
            "limit": limit,
        }
        rows = _as(OutboxRow, await self._fetch(self._sql["claim"], params))
        return sorted(rows, key=lambda r: r.id)

    async def bundle_of(self, entry: OutboxRow) -> bytes:
        """The Bundle JSON of the entry's note version, compressed as stored."""
        [(bundle,)] = await self._fetch(
            self._sql["bundle_of"], {"key": entry.note_key, "version": entry.version}
        )
        return bytes(bundle)

    async def delivered(self, entry_id: int, worker: str, status: int, now: datetime) -> bool:
        """The receiver took the Bundle; False when this worker no longer held the entry."""
        params = {"entry_id": entry_id, "worker": worker, "status": status, "at": self._time(now)}
        return bool(await self._fetch(self._sql["delivered"], params))

    async def retry_later(
        self, entry_id: int, worker: str, status: int | None, error: str, at: datetime
    ) -> bool:
        """A passing failure: try again at the given time."""
        params = {
            "entry_id": entry_id,
            "worker": worker,
            "status": status,
            "error": error[:4000],
            "at": self._time(at),
        }
        return bool(await self._fetch(self._sql["retry_later"], params))

    async def park(self, entry_id: int, worker: str, status: int | None, error: str) -> bool:
        """A failure retrying will not mend: kept, with the receiver's answer, for a person."""
        params = {"entry_id": entry_id, "worker": worker, "status": status, "error": error[:4000]}
        return bool(await self._fetch(self._sql["park"], params))

    async def outbox_of_note(self, key: str) -> list[OutboxRow]:
        """Every outbox entry of a note, by version."""
        return _as(OutboxRow, await self._fetch(self._sql["outbox_of_note"], {"key": key}))

    async def outbox(self, state: str | None, limit: int) -> list[OutboxRow]:
        """Outbox entries, newest first, optionally in one state."""
        if state is None:
            rows = await self._fetch(self._sql["outbox_all"], {"limit": limit})
        else:
            rows = await self._fetch(self._sql["outbox_in_state"], {"state": state, "limit": limit})
        return _as(OutboxRow, rows)

    async def operator_set(self, entry_id: int, state: str, now: datetime) -> bool:
        """An operator's retry (state pending: due now) or park (state failed); False for a
        delivered or unknown entry."""
        if state == PENDING:
            sql, params = self._sql["operator_retry"], {"entry_id": entry_id, "at": self._time(now)}
        elif state == FAILED:
            sql, params = self._sql["operator_park"], {"entry_id": entry_id}
        else:
            raise ValueError(f"an operator sets an entry pending or failed, not {state}")
        return bool(await self._fetch(sql, params))


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
