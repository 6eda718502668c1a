"""The review visit records' rows and statements (capnote.reviews), defined once for both
engines like the note statements in capnote.store.base."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import and_, bindparam, func, insert, select
from sqlalchemy.sql import ClauseElement

from capnote.store.tables import ReviewVersion

_REVIEW = ReviewVersion.__table__  # type: ignore[attr-defined]


@dataclass(frozen=True, slots=True)
class ReviewRow:
    """One stored version of a review visit record, as written and as read back."""

    review_key: str
    version: int
    session_key: str
    sender_system: str
    sender_value: str
    patient_system: str
    patient_value: str
    eye: str
    seen_at: datetime
    status: str
    attended: bool
    content_hash: str
    review_json: str
    result_json: str
    bundle: bytes  # compressed (capnote.store.codec)
    roles: str  # packed (capnote.store.codec)
    reason: str | None
    recorded_at: datetime
    recorded_by: str
    recorded_by_token: int | None = None
    # What the clinical audit counts; None: not recorded (never "no").
    cystoid_macular_oedema: bool | None = None
    retinal_detachment: bool | None = None
    anterior_uveitis: bool | None = None
    raised_iop: bool | None = None
    iol_pits: bool | None = None
    retreatment: bool | None = None
    opening_adequate: bool | None = None


REVIEW_COLUMNS = tuple(ReviewRow.__slots__)
_OUT = tuple(_REVIEW.c[name] for name in REVIEW_COLUMNS)
_newest = (
    select(_REVIEW.c.review_key, func.max(_REVIEW.c.version).label("v"))
    .where(_REVIEW.c.session_key == bindparam("session"))
    .group_by(_REVIEW.c.review_key)
    .subquery()
)

STATEMENTS: dict[str, ClauseElement] = {
    "review_latest": select(*_OUT)
    .where(_REVIEW.c.review_key == bindparam("key"))
    .order_by(_REVIEW.c.version.desc())
    .limit(1),
    "review_version": select(*_OUT).where(
        _REVIEW.c.review_key == bindparam("key"), _REVIEW.c.version == bindparam("version")
    ),
    "review_versions": select(*_OUT)
    .where(_REVIEW.c.review_key == bindparam("key"))
    .order_by(_REVIEW.c.version),
    "review_hashes": select(_REVIEW.c.content_hash)
    .where(_REVIEW.c.review_key == bindparam("key"))
    .order_by(_REVIEW.c.version),
    # The newest version of each review of one session, in the order they were seen.
    "reviews_of_session": select(*_OUT)
    .join(
        _newest,
        and_(_REVIEW.c.review_key == _newest.c.review_key, _REVIEW.c.version == _newest.c.v),
    )
    .order_by(_REVIEW.c.seen_at, _REVIEW.c.review_key)
    .limit(500),
    "add_review": insert(_REVIEW)
    .inline()
    .values({name: bindparam(name) for name in REVIEW_COLUMNS}),
}


def review_params(row: ReviewRow, time: Any) -> dict[str, Any]:
    """The insert's parameters, times as the driver binds them (time: Store._time)."""
    values = {name: getattr(row, name) for name in REVIEW_COLUMNS}
    values["seen_at"] = time(row.seen_at)
    values["recorded_at"] = time(row.recorded_at)
    return values
