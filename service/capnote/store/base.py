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
from functools import partial
from typing import Any, TypeVar

from sqlalchemy import (
    Integer,
    and_,
    bindparam,
    exists,
    false,
    func,
    insert,
    literal,
    null,
    or_,
    select,
    true,
    tuple_,
    union_all,
    update,
)
from sqlalchemy.engine import Dialect
from sqlalchemy.sql import ClauseElement

from capnote.derive import PriorSession
from capnote.fhir.readmodel import Searchable
from capnote.fhir.search import Criteria
from capnote.store import audit_sql, review_sql
from capnote.store.audit_sql import GroupFigures
from capnote.store.review_sql import REVIEW_COLUMNS, ReviewRow, review_params
from capnote.store.tables import (
    ApiToken,
    AuditEntry,
    FhirIndex,
    FhirToken,
    NoteVersion,
    OutboxEntry,
    ReviewVersion,
)
from capnote.tokens import hash_token, new_secret

_NOTE = NoteVersion.__table__  # type: ignore[attr-defined]
_INDEX = FhirIndex.__table__  # type: ignore[attr-defined]
_AUDIT = AuditEntry.__table__  # type: ignore[attr-defined]
_OUTBOX = OutboxEntry.__table__  # type: ignore[attr-defined]
_REVIEW = ReviewVersion.__table__  # type: ignore[attr-defined]
_TOKEN = ApiToken.__table__  # type: ignore[attr-defined]
_TOKEN_ROWS = FhirToken.__table__  # type: ignore[attr-defined]
# The columns a version's search rows are written with (both drivers).
INDEX_COLUMNS = (
    "note_key",
    "role",
    "version",
    "resource_type",
    "status",
    "date",
    "date_end",
    "sort_at",
)
TOKEN_ROW_COLUMNS = ("note_key", "version", "role", "param", "system", "code")


class DuplicateVersionError(Exception):
    """Another writer stored this (note, version) first."""


@dataclass(frozen=True, slots=True)
class TokenRow:
    """A live token: whose it is (label: a person's display name or a system client's
    name; staff: the person's staff identifier) and its role."""

    id: int
    label: str
    role: str
    staff: tuple[str, str] | None
    expires_at: datetime | None
    last_used_at: datetime | None


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
    recorded_by_token: int | None = None
    signed_by: str | None = None
    signed_by_staff: str | None = None  # system|value
    signed_at: datetime | None = None
    # The audit's facts (capnote.store.tables.NoteVersion).
    site: str | None = None
    site_name: str | None = None
    performer: str | None = None
    performer_name: str | None = None
    spike_grade: str | None = None
    glaucoma: str | None = None
    prophylaxis: bool | None = None
    cataract_days: int | None = None
    review_booked: bool | None = None


VERSION_COLUMNS = tuple(VersionRow.__slots__)


@dataclass(frozen=True, slots=True)
class AuditRow:
    """Who did what to which version, from where."""

    at: datetime
    actor: str
    role: str
    action: str
    remote: str | None
    token_id: int | None = None
    detail: str | None = None
    outcome: str = "ok"


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
    staff_system: str | None
    staff_value: str | None
    expires_at: datetime | None
    last_used_at: datetime | None


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
    token_id: int | None
    detail: str | None


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
    sort_at: datetime  # where the search's order put it (a next page starts after it)


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
    "token": select(
        _TOKEN.c.token_hash,
        _TOKEN.c.label,
        _TOKEN.c.role,
        _TOKEN.c.revoked_at,
        _TOKEN.c.id,
        _TOKEN.c.staff_system,
        _TOKEN.c.staff_value,
        _TOKEN.c.expires_at,
        _TOKEN.c.last_used_at,
    ).where(_TOKEN.c.token_hash == bindparam("digest")),
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
    .values({name: bindparam(name) for name in INDEX_COLUMNS} | {"latest": True}),
    "add_search_tokens": insert(_TOKEN_ROWS)
    .inline()
    .values({name: bindparam(name) for name in TOKEN_ROW_COLUMNS}),
    "add_audit": insert(_AUDIT)
    .inline()
    .values(
        {
            name: bindparam(name)
            for name in (
                "at",
                "actor",
                "role",
                "action",
                "note_key",
                "version",
                "remote",
                "outcome",
                "token_id",
                "detail",
            )
        }
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


TOKEN_COLUMNS = tuple(f.name for f in fields(TokenInfo))
AUDIT_COLUMNS = tuple(f.name for f in fields(AuditRecord))
_TOKEN_NEW = (
    "token_hash",
    "role",
    "label",
    "created_at",
    "staff_system",
    "staff_value",
    "expires_at",
)
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
        .values({name: bindparam(name) for name in _TOKEN_NEW})
        .returning(_TOKEN.c.id),
        "touch_token": update(_TOKEN)
        .where(_TOKEN.c.id == bindparam("token_id"))
        .values(last_used_at=bindparam("at")),
        "tokens": select(*(_TOKEN.c[name] for name in TOKEN_COLUMNS)).order_by(_TOKEN.c.id),
        "revoke_token": update(_TOKEN)
        .where(_TOKEN.c.id == bindparam("token_id"), _TOKEN.c.revoked_at.is_(None))
        .values(revoked_at=bindparam("at"))
        .returning(_TOKEN.c.id),
        "audit_all": select(*(_AUDIT.c[name] for name in AUDIT_COLUMNS))
        .order_by(_AUDIT.c.id.desc())
        .offset(bindparam("offset", type_=Integer))
        .limit(bindparam("limit", type_=Integer)),
        "audit_one": select(*(_AUDIT.c[name] for name in AUDIT_COLUMNS)).where(
            _AUDIT.c.id == bindparam("entry_id")
        ),
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
        # An outbox entry names a note version or a review version (their keys are UUIDs
        # from different names, so a key is one or the other, never both).
        "bundle_of": union_all(
            select(_NOTE.c.bundle).where(
                _NOTE.c.note_key == bindparam("key"), _NOTE.c.version == bindparam("version")
            ),
            select(_REVIEW.c.bundle).where(
                _REVIEW.c.review_key == bindparam("key"), _REVIEW.c.version == bindparam("version")
            ),
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


STATEMENTS.update(review_sql.STATEMENTS)


def _worklist() -> ClauseElement:
    """The latest version of each note whose session starts in a range (a clinic day) or
    that is a draft last saved with one token: the form's worklist."""

    def wanted() -> Any:
        return or_(
            and_(_NOTE.c.started_at >= bindparam("start"), _NOTE.c.started_at < bindparam("end")),
            and_(
                _NOTE.c.recorded_by_token == bindparam("author"),
                or_(_NOTE.c.status == bindparam("draft"), _NOTE.c.status == bindparam("partial")),
            ),
        )

    newest = (
        select(_NOTE.c.note_key, func.max(_NOTE.c.version).label("v"))
        .where(_NOTE.c.note_key.in_(select(_NOTE.c.note_key).where(wanted())))
        .group_by(_NOTE.c.note_key)
        .subquery()
    )
    joined = _NOTE.join(
        newest, and_(_NOTE.c.note_key == newest.c.note_key, _NOTE.c.version == newest.c.v)
    )
    return (
        select(*(_NOTE.c[name] for name in VERSION_COLUMNS))
        .select_from(joined)
        .where(wanted())
        .order_by(_NOTE.c.started_at, _NOTE.c.note_key)
        .limit(bindparam("limit", type_=Integer))
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


# A search's shape: one spec per clause (its kind and how many values it ORs, never the
# values), so that one compiled statement serves every search of the same shape.
SearchShape = tuple[tuple[object, ...], ...]


def search_shape(found: Criteria) -> tuple[SearchShape, dict[str, Any]]:
    """The shape of a search and the values it binds (named after their place in it)."""
    shape: list[tuple[object, ...]] = []
    params: dict[str, Any] = {"kind": found.kind}

    def clause(spec: tuple[object, ...], values: dict[str, Any]) -> None:
        i = len(shape)
        shape.append(spec)
        params.update({f"c{i}_{name}": value for name, value in values.items()})

    for patients in found.patients:
        clause(
            ("patient", len(patients)),
            {f"{j}s": s for j, (s, _v) in enumerate(patients)}
            | {f"{j}v": v for j, (_s, v) in enumerate(patients)},
        )
    for ids in found.ids:
        clause(
            ("id", len(ids)),
            {f"{j}k": k for j, (k, _r) in enumerate(ids)}
            | {f"{j}r": r for j, (_k, r) in enumerate(ids)},
        )
    for param, tokens in found.tokens:
        forms = tuple("any-system" if t.system is None else "system" for t in tokens)
        values: dict[str, Any] = {"param": param}
        for j, t in enumerate(tokens):
            values[f"{j}c"] = t.code
            if t.system is not None:
                values[f"{j}s"] = t.system
        clause(("token", forms), values)
    for negated, codes in found.statuses:
        clause(("status", negated, len(codes)), {f"{j}": c for j, c in enumerate(codes)})
    for eyes in found.eyes:
        clause(("eye", len(eyes)), {f"{j}": e for j, e in enumerate(eyes)})
    for column, tests in (("date", found.dates), ("updated", found.updated)):
        for alternatives in tests:
            clause(
                (column, tuple(t.prefix for t in alternatives)),
                {f"{j}lo": t.low for j, t in enumerate(alternatives)}
                | {f"{j}hi": t.high for j, t in enumerate(alternatives)},
            )
    if found.cursor is not None:
        params["after_at"] = found.cursor.sort_at
        params["after_key"] = found.cursor.note_key
        params["after_role"] = found.cursor.role
    return tuple(shape), params


def _date_test(prefix: str, start: Any, end: Any, low: Any, high: Any) -> Any:
    """FHIR R4 date comparison (search 2.1.1.5.5) of a resource's range [start, end] with
    a search value's range [low, high]."""
    inside = and_(start >= low, end <= high)
    tests: dict[str, Any] = {
        "eq": inside,
        "ne": or_(start < low, end > high),
        "gt": end > high,
        "lt": start < low,
        "ge": or_(end > high, inside),
        "le": or_(start < low, inside),
        "sa": start > high,
        "eb": end < low,
        "ap": and_(start <= high, end >= low),
    }
    return tests[prefix]


def _condition(i: int, spec: tuple[object, ...]) -> Any:
    """The SQL of clause i of a search shape."""
    name = spec[0]

    def p(suffix: str) -> Any:
        return bindparam(f"c{i}_{suffix}")

    if name == "patient":
        n = int(spec[1])  # type: ignore[call-overload]
        return or_(
            false(),
            *(
                and_(_NOTE.c.patient_system == p(f"{j}s"), _NOTE.c.patient_value == p(f"{j}v"))
                for j in range(n)
            ),
        )
    if name == "id":
        n = int(spec[1])  # type: ignore[call-overload]
        return or_(
            false(),
            *(and_(_INDEX.c.note_key == p(f"{j}k"), _INDEX.c.role == p(f"{j}r")) for j in range(n)),
        )
    if name == "token":
        forms: tuple[str, ...] = spec[1]  # type: ignore[assignment]
        matches = []
        for j, form in enumerate(forms):
            code = _TOKEN_ROWS.c.code == p(f"{j}c")
            matches.append(
                and_(code, _TOKEN_ROWS.c.system == p(f"{j}s")) if form == "system" else code
            )
        return exists().where(
            _TOKEN_ROWS.c.note_key == _INDEX.c.note_key,
            _TOKEN_ROWS.c.version == _INDEX.c.version,
            _TOKEN_ROWS.c.role == _INDEX.c.role,
            _TOKEN_ROWS.c.param == p("param"),
            or_(false(), *matches),
        )
    if name == "status":
        negated, n = bool(spec[1]), int(spec[2])  # type: ignore[call-overload]
        if n == 0:
            return true() if negated else false()
        codes = [p(f"{j}") for j in range(n)]
        return _INDEX.c.status.not_in(codes) if negated else _INDEX.c.status.in_(codes)
    if name == "eye":
        n = int(spec[1])  # type: ignore[call-overload]
        return _NOTE.c.eye.in_([p(f"{j}") for j in range(n)])
    prefixes: tuple[str, ...] = spec[1]  # type: ignore[assignment]
    if name == "date":
        start, end = _INDEX.c.date, _INDEX.c.date_end
    else:  # "updated": when the version was recorded, a moment
        start = end = _NOTE.c.recorded_at
    return or_(
        false(),
        *(
            and_(start.is_not(None), _date_test(prefix, start, end, p(f"{j}lo"), p(f"{j}hi")))
            for j, prefix in enumerate(prefixes)
        ),
    )


def _search(shape: SearchShape, descending: bool, cursor: bool, count: bool) -> ClauseElement:
    """Current resources of one type that meet every clause of the shape, in the order of
    their date (then note and role, so the order is total), after the cursor's row when
    there is one: keyset paging, so rows written meanwhile before the cursor shift nothing."""
    conditions = [_INDEX.c.resource_type == bindparam("kind"), _INDEX.c.latest.is_(True)]
    conditions += [_condition(i, spec) for i, spec in enumerate(shape)]
    joined = _INDEX.join(
        _NOTE, and_(_NOTE.c.note_key == _INDEX.c.note_key, _NOTE.c.version == _INDEX.c.version)
    )
    if count:
        return select(func.count()).select_from(joined).where(*conditions)
    key = tuple_(_INDEX.c.sort_at, _INDEX.c.note_key, _INDEX.c.role)
    if cursor:
        after = tuple_(bindparam("after_at"), bindparam("after_key"), bindparam("after_role"))
        conditions.append(key < after if descending else key > after)
    order = [_INDEX.c.sort_at, _INDEX.c.note_key, _INDEX.c.role]
    return (
        select(
            _INDEX.c.role,
            _INDEX.c.note_key,
            _INDEX.c.version,
            _NOTE.c.recorded_at,
            _NOTE.c.bundle,
            _NOTE.c.roles,
            _INDEX.c.sort_at,
        )
        .select_from(joined)
        .where(*conditions)
        .order_by(*(c.desc() for c in order) if descending else order)
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


# How many statements of varying shape a store keeps compiled (searches, listings).
_VARIANTS_KEPT = 512


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
            if len(self._variants) >= _VARIANTS_KEPT:  # searches vary: forget the oldest
                self._variants.pop(next(iter(self._variants)))
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

    @abstractmethod
    async def write_all(
        self,
        steps: Sequence[tuple[str, dict[str, Any]]],
        versions: Sequence[NewVersion] = (),
        *,
        forward: bool = False,
    ) -> None:
        """Run fixed statements (by name, with their parameters) and store note versions (as
        write_many) in one transaction, all or nothing; DuplicateVersionError when a unique
        constraint refuses a row."""

    # -- review visit records (capnote.reviews) ---------------------------------------------

    async def review_latest(self, key: str) -> ReviewRow | None:
        """The newest version of a review record, or None."""
        rows = await self._fetch(self._sql["review_latest"], {"key": key})
        return review_row(rows[0]) if rows else None

    async def review_version(self, key: str, version: int) -> ReviewRow | None:
        """One version of a review record, or None."""
        rows = await self._fetch(self._sql["review_version"], {"key": key, "version": version})
        return review_row(rows[0]) if rows else None

    async def review_versions(self, key: str) -> list[ReviewRow]:
        """Every version of a review record, oldest first."""
        return [
            review_row(r) for r in await self._fetch(self._sql["review_versions"], {"key": key})
        ]

    async def review_hashes(self, key: str) -> list[str]:
        """The content digests of a review record's versions (none for a new one)."""
        return [r[0] for r in await self._fetch(self._sql["review_hashes"], {"key": key})]

    async def reviews_of_session(self, session_key: str) -> list[ReviewRow]:
        """The newest version of each review record of one laser session, as seen."""
        rows = await self._fetch(self._sql["reviews_of_session"], {"session": session_key})
        return [review_row(r) for r in rows]

    async def write_review(
        self,
        row: ReviewRow,
        audit: AuditRow,
        *,
        forward: bool,
        session: NewVersion | None = None,
    ) -> None:
        """Add one review version, its audit entry and, when forwarding, its outbox entry,
        with the new version of its session that the review makes (its review request
        completed, or owed again), all or nothing; DuplicateVersionError when another
        writer stored either first."""
        steps = [
            ("add_review", review_params(row, self._time)),
            ("add_audit", audit_params(audit, row.review_key, row.version, self._time)),
        ]
        if forward:
            at = self._time(row.recorded_at)
            steps.append(
                ("add_outbox", {"note_key": row.review_key, "version": row.version, "at": at})
            )
        await self.write_all(steps, () if session is None else (session,), forward=forward)

    # -- the clinical audit (capnote.store.audit_sql) ---------------------------------------

    async def audit_figures(
        self, start: datetime, end: datetime, site: str | None
    ) -> list[GroupFigures]:
        """Aggregates of the final sessions starting in [start, end), optionally at one unit:
        all units together, each unit, each clinician within a unit (in that order)."""
        params: dict[str, Any] = {"start": self._time(start), "end": self._time(end)}
        if site is not None:
            params["site"] = site
        one = site is not None
        out: list[GroupFigures] = []
        reviews = await self._fetch(
            self._variant(("audit", "reviews", one), partial(audit_sql.review_counts, one)),
            params,
        )
        for level in audit_sql.LEVELS:
            shapes = {
                "counts": partial(audit_sql.counts, level, one),
                "energy": partial(audit_sql.quartile_rows, level, "total_energy_mj", one),
                "cataract": partial(audit_sql.quartile_rows, level, "cataract_days", one),
            }
            rows = [
                await self._fetch(self._variant(("audit", name, level, one), build), params)
                for name, build in shapes.items()
            ]
            counted, energy, cataract = rows
            out += audit_sql.figures(level, counted, energy, cataract, reviews)
        return out

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

    async def worklist(
        self, start: datetime, end: datetime, author: int | None, limit: int
    ) -> list[VersionRow]:
        """The latest version of each note whose session starts in [start, end) or that is
        a draft whose latest version the token author saved, in session order (at most
        limit)."""
        statement = self._variant(("worklist",), _worklist)
        params = {
            "start": self._time(start),
            "end": self._time(end),
            "author": author,
            "draft": "draft",
            "partial": "partial",
            "limit": limit,
        }
        return [version_row(r) for r in await self._fetch(statement, params)]

    async def fhir_search(
        self, found: Criteria, *, total: bool, limit: int
    ) -> tuple[int | None, list[Found]]:
        """Current resources of a type that meet the criteria (see capnote.fhir.search),
        one page of them after the criteria's cursor, with the stored version each is read
        from; and how many match in all, when total is asked for (None otherwise).

        The patient is the one of the version the resource belongs to, so a note amended
        onto another patient is found under the new one only."""
        shape, values = search_shape(found)
        params = {k: self._time(v) if isinstance(v, datetime) else v for k, v in values.items()}
        cursor = found.cursor is not None
        counted: int | None = None
        if total:
            sql = self._variant(("count", shape), lambda: _search(shape, False, False, True))
            keyset = ("after_at", "after_key", "after_role")
            [(n,)] = await self._fetch(sql, {k: v for k, v in params.items() if k not in keyset})
            counted = int(n)
        if limit == 0:
            return counted, []
        listed = self._variant(
            ("search", shape, found.descending, cursor),
            lambda: _search(shape, found.descending, cursor, False),
        )
        rows = await self._fetch(listed, {**params, "limit": limit})
        return counted, [
            Found(role, key, version, read_moment(at), bytes(bundle), roles, read_moment(sort))
            for role, key, version, at, bundle, roles, sort in rows
        ]

    # -- tokens ------------------------------------------------------------------------------

    async def new_token(
        self,
        role: str,
        label: str,
        now: datetime,
        *,
        staff: tuple[str, str] | None = None,
        expires_at: datetime | None = None,
    ) -> tuple[str, int]:
        """Create a token: (the token, shown once and never stored; its id)."""
        token = new_secret()
        params = {
            "token_hash": hash_token(token),
            "role": role,
            "label": label,
            "created_at": self._time(now),
            "staff_system": staff[0] if staff else None,
            "staff_value": staff[1] if staff else None,
            "expires_at": None if expires_at is None else self._time(expires_at),
        }
        [(token_id,)] = await self._fetch(self._sql["add_token"], params)
        return token, int(token_id)

    async def tokens(self) -> list[TokenInfo]:
        """Every token, revoked ones included, oldest first."""
        return _as(TokenInfo, await self._fetch(self._sql["tokens"], {}))

    async def token_used(self, token_id: int, now: datetime) -> None:
        """Record when a token was last used (the caller writes it at most once a minute)."""
        await self._fetch(self._sql["touch_token"], {"token_id": token_id, "at": self._time(now)})

    async def record(self, entry: AuditRow, note_key: str | None, version: int | None) -> None:
        """An audit entry of its own: a read, a search, a refusal, a token made or revoked,
        a delivery (a stored version's entry is written with the version instead)."""
        await self._fetch(
            self._sql["add_audit"], audit_params(entry, note_key, version, self._time)
        )

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

    async def audit_entry(self, entry_id: int) -> AuditRecord | None:
        """One audit entry by id."""
        rows = await self._fetch(self._sql["audit_one"], {"entry_id": entry_id})
        found = _as(AuditRecord, rows)
        return found[0] if found else None

    async def audit_search(
        self,
        *,
        after: tuple[str, datetime] | None = None,
        before: tuple[str, datetime] | None = None,
        token_id: int | None = None,
        actor: str | None = None,
        note_key: str | None = None,
        outcome: str | None = None,
        offset: int = 0,
        limit: int = 100,
    ) -> tuple[int, list[AuditRecord]]:
        """Audit entries by time (after: ("ge" | "gt", t), before: ("le" | "lt", t)), token,
        actor name (starts with, any case), note and outcome class ("0" success, "4" refused,
        "8" failed on capnote's or the receiver's side: AuditEvent.outcome); newest first,
        with how many match in all."""
        shape = (
            None if after is None else after[0],
            None if before is None else before[0],
            token_id is not None,
            actor is not None,
            note_key is not None,
            outcome,
        )
        params: dict[str, Any] = {}
        if after is not None:
            params["after"] = self._time(after[1])
        if before is not None:
            params["before"] = self._time(before[1])
        if token_id is not None:
            params["token_id"] = token_id
        if actor is not None:
            escaped = actor.lower().replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
            params["actor"] = escaped + "%"
        if note_key is not None:
            params["note_key"] = note_key
        counted = self._variant(("audit", *shape, True), lambda: _audit_search(*shape, True))
        listed = self._variant(("audit", *shape, False), lambda: _audit_search(*shape, False))
        [(total,)] = await self._fetch(counted, params)
        rows = await self._fetch(listed, {**params, "offset": offset, "limit": limit})
        return int(total), _as(AuditRecord, rows)

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


def _failed_on_a_server(column: Any) -> Any:
    """An outcome that is a server's failure: capnote's 5xx, or a delivery the receiver
    answered 5xx or never answered."""
    return or_(column.like("5%"), column.like("retry-5%"), column == "retry-network")


def _audit_search(
    after: str | None,
    before: str | None,
    token: bool,
    actor: bool,
    note: bool,
    outcome: str | None,
    count: bool,
) -> ClauseElement:
    a = _AUDIT.c
    conditions: list[Any] = []
    if after is not None:
        conditions.append(
            a.at > bindparam("after") if after == "gt" else a.at >= bindparam("after")
        )
    if before is not None:
        conditions.append(
            a.at < bindparam("before") if before == "lt" else a.at <= bindparam("before")
        )
    if token:
        conditions.append(a.token_id == bindparam("token_id"))
    if actor:
        conditions.append(func.lower(a.actor).like(bindparam("actor"), escape="\\"))
    if note:
        conditions.append(a.note_key == bindparam("note_key"))
    if outcome == "0":
        conditions.append(a.outcome == "ok")
    elif outcome == "4":
        conditions.append(and_(a.outcome != "ok", ~_failed_on_a_server(a.outcome)))
    elif outcome == "8":
        conditions.append(_failed_on_a_server(a.outcome))
    elif outcome is not None:  # 12, a major failure: capnote records none
        conditions.append(literal(False))
    if count:
        return select(func.count()).select_from(_AUDIT).where(*conditions)
    return (
        select(*(a[name] for name in AUDIT_COLUMNS))
        .where(*conditions)
        .order_by(a.id.desc())
        .offset(bindparam("offset", type_=Integer))
        .limit(bindparam("limit", type_=Integer))
    )


def token_row(row: Sequence[Any] | None, digest: str) -> TokenRow | None:
    """A token that was not revoked, from the "token" statement's row, or None (whether it
    has expired is the caller's question: it knows the time)."""
    # The hash is compared once more in constant time, though the lookup already matched it.
    if row is None or row[3] is not None or not hmac.compare_digest(row[0], digest):
        return None
    _hash, label, role, _revoked, token_id, system, value, expires, used = row
    return TokenRow(
        id=int(token_id),
        label=label,
        role=role,
        staff=(system, value) if system and value else None,
        expires_at=None if expires is None else read_moment(expires),
        last_used_at=None if used is None else read_moment(used),
    )


def audit_params(
    entry: AuditRow,
    note_key: str | None,
    version: int | None,
    moment: Callable[[datetime], Any],
) -> dict[str, Any]:
    """The parameters of "add_audit" for an entry (moment: the engine's way with times)."""
    return {
        "at": moment(entry.at),
        "actor": entry.actor,
        "role": entry.role,
        "action": entry.action,
        "note_key": note_key,
        "version": version,
        "remote": entry.remote,
        "outcome": entry.outcome,
        "token_id": entry.token_id,
        "detail": entry.detail,
    }


def sessions_from_rows(key: str, rows: Sequence[Sequence[Any]]) -> list[PriorSession]:
    """PriorSession from (note_key, started_at, total_energy_mj, status) rows, leaving out
    the note itself, voided notes and drafts kept as typed (capnote.drafts: not yet a
    session the record knows)."""
    return [
        PriorSession(read_moment(started), energy or 0.0, k)
        for k, started, energy, status in rows
        if k != key and status not in ("void", "partial")
    ]


def read_moment(value: Any) -> datetime:
    """An aware UTC time from what a driver returned (SQLite: SQLAlchemy's text form)."""
    moment = datetime.fromisoformat(value) if isinstance(value, str) else value
    assert isinstance(moment, datetime)
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def review_row(row: Sequence[Any]) -> ReviewRow:
    """A ReviewRow from a row of REVIEW_COLUMNS, as either driver returns it."""
    values = dict(zip(REVIEW_COLUMNS, row, strict=True))
    values["seen_at"] = read_moment(values["seen_at"])
    values["recorded_at"] = read_moment(values["recorded_at"])
    values["bundle"] = bytes(values["bundle"])
    for name in ("attended", *REVIEW_COLUMNS[-7:]):
        if values[name] is not None:  # SQLite hands booleans back as 0 and 1
            values[name] = bool(values[name])
    return ReviewRow(**values)


def version_row(row: Sequence[Any]) -> VersionRow:
    """A VersionRow from a row of VERSION_COLUMNS, as either driver returns it."""
    values = dict(zip(VERSION_COLUMNS, row, strict=True))
    values["started_at"] = read_moment(values["started_at"])
    values["recorded_at"] = read_moment(values["recorded_at"])
    if values["signed_at"] is not None:
        values["signed_at"] = read_moment(values["signed_at"])
    values["bundle"] = bytes(values["bundle"])
    return VersionRow(**values)
