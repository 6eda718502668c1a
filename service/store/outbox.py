"""The outbox: entries to deliver, claimed by one worker at a time.

A claim is a conditional UPDATE (state and lease checked in its WHERE), so two workers, even
in two processes, can never both hold an entry; on PostgreSQL the candidates are also picked
with FOR UPDATE SKIP LOCKED so workers do not queue behind each other's rows.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta

from sqlalchemy import ColumnElement, or_, update
from sqlmodel import Session, col, select

from service.store.codec import unpack_bundle
from service.store.repository import to_db
from service.store.tables import NoteVersion, OutboxEntry

PENDING, DELIVERING, DELIVERED, FAILED = "pending", "delivering", "delivered", "failed"


def _due(now: datetime) -> ColumnElement[bool]:
    return or_(
        (col(OutboxEntry.state) == PENDING) & (col(OutboxEntry.next_attempt_at) <= to_db(now)),
        (col(OutboxEntry.state) == DELIVERING) & (col(OutboxEntry.claimed_until) < to_db(now)),
    )


def claim(
    session: Session, worker: str, now: datetime, lease: timedelta, limit: int
) -> list[OutboxEntry]:
    """Claim up to limit due entries for this worker, oldest first; commits the claim."""
    candidates = select(OutboxEntry.id).where(_due(now)).order_by(col(OutboxEntry.id)).limit(limit)
    if session.get_bind().dialect.name == "postgresql":
        candidates = candidates.with_for_update(skip_locked=True)
    ids = list(session.exec(candidates).all())
    claimed: list[int] = []
    for entry_id in ids:
        result = session.execute(
            update(OutboxEntry)
            .where(col(OutboxEntry.id) == entry_id, _due(now))
            .values(
                state=DELIVERING,
                claimed_by=worker,
                claimed_until=to_db(now + lease),
                attempts=OutboxEntry.attempts + 1,
            )
        )
        if result.rowcount == 1:  # type: ignore[attr-defined]
            claimed.append(entry_id)  # type: ignore[arg-type]
    session.commit()
    if not claimed:
        return []
    rows = session.exec(select(OutboxEntry).where(col(OutboxEntry.id).in_(claimed))).all()
    return sorted(rows, key=lambda r: r.id or 0)


def bundle_of(session: Session, entry: OutboxEntry) -> bytes:
    """The Bundle JSON of the entry's note version."""
    row = session.exec(
        select(NoteVersion.bundle).where(
            NoteVersion.note_key == entry.note_key, NoteVersion.version == entry.version
        )
    ).one()
    return unpack_bundle(bytes(row))


def _finish(session: Session, entry_id: int, worker: str, **values: object) -> bool:
    """Record an outcome if this worker still holds the entry."""
    result = session.execute(
        update(OutboxEntry)
        .where(
            col(OutboxEntry.id) == entry_id,
            col(OutboxEntry.claimed_by) == worker,
            col(OutboxEntry.state) == DELIVERING,
        )
        .values(claimed_by=None, claimed_until=None, **values)
    )
    session.commit()
    return bool(result.rowcount == 1)  # type: ignore[attr-defined]


def delivered(session: Session, entry_id: int, worker: str, status: int, now: datetime) -> bool:
    """The receiver took the Bundle."""
    return _finish(
        session,
        entry_id,
        worker,
        state=DELIVERED,
        last_status=status,
        last_error=None,
        delivered_at=to_db(now),
    )


def retry_later(
    session: Session, entry_id: int, worker: str, status: int | None, error: str, at: datetime
) -> bool:
    """A passing failure: try again at the given time."""
    return _finish(
        session,
        entry_id,
        worker,
        state=PENDING,
        last_status=status,
        last_error=error[:4000],
        next_attempt_at=to_db(at),
    )


def park(session: Session, entry_id: int, worker: str, status: int | None, error: str) -> bool:
    """A failure retrying will not mend: keep it, with the receiver's answer, for a person."""
    return _finish(
        session, entry_id, worker, state=FAILED, last_status=status, last_error=error[:4000]
    )


def for_note(session: Session, note_key: str) -> Sequence[OutboxEntry]:
    """Every entry of a note, by version."""
    return session.exec(
        select(OutboxEntry)
        .where(OutboxEntry.note_key == note_key)
        .order_by(col(OutboxEntry.version))
    ).all()


def listing(session: Session, state: str | None, limit: int) -> Sequence[OutboxEntry]:
    """Entries, newest first, optionally in one state."""
    statement = select(OutboxEntry)
    if state is not None:
        statement = statement.where(OutboxEntry.state == state)
    return session.exec(statement.order_by(col(OutboxEntry.id).desc()).limit(limit)).all()


def operator_set(session: Session, entry_id: int, state: str, now: datetime) -> bool:
    """An operator's retry (back to pending, due now) or park (failed)."""
    values: dict[str, object] = {"state": state, "claimed_by": None, "claimed_until": None}
    if state == PENDING:
        values["next_attempt_at"] = to_db(now)
    result = session.execute(
        update(OutboxEntry)
        .where(col(OutboxEntry.id) == entry_id, col(OutboxEntry.state) != DELIVERED)
        .values(**values)
    )
    session.commit()
    return bool(result.rowcount == 1)  # type: ignore[attr-defined]
