"""The stored tables. Rows are only ever added: a new note version is a new row, a voided
note is a new version with status "void", a revoked token keeps its row.

Each note version keeps its Bundle once, compressed (capnote.store.codec); the FHIR read API
serves resources out of it, and fhir_index holds only what its searches filter on.

Times are aware and stored in UTC (SQLModel's UTCDateTime; SQLite keeps no offset, so UTC is
what makes comparisons agree on both engines).
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import Column, Index, LargeBinary, Text, UniqueConstraint, text
from sqlmodel import Field, SQLModel

from capnote.tokens import LABEL_MAX, REMOTE_MAX


class NoteVersion(SQLModel, table=True):
    """One version of one note, with what capnote made of it."""

    __tablename__ = "note_version"
    __table_args__ = (
        # The constraint that makes concurrent submissions of one note produce one record.
        UniqueConstraint("note_key", "version", name="uq_note_version"),
        Index("ix_note_version_patient_eye", "patient_system", "patient_value", "eye"),
    )

    id: int | None = Field(default=None, primary_key=True)
    note_key: str = Field(max_length=36)
    version: int
    sender_system: str = Field(max_length=255)
    sender_value: str = Field(max_length=64)
    patient_system: str = Field(max_length=255)
    patient_value: str = Field(max_length=64)
    eye: str = Field(max_length=5)
    started_at: datetime
    status: str = Field(max_length=8)
    total_energy_mj: float | None = None
    content_hash: str = Field(max_length=64)
    note_json: str = Field(sa_column=Column(Text, nullable=False))
    result_json: str = Field(sa_column=Column(Text, nullable=False))
    # The emitted Bundle's JSON, zstd-compressed: a fifth of its size, and the largest part
    # of each row (fewer pages written per note, fewer to read back).
    bundle: bytes = Field(sa_column=Column(LargeBinary, nullable=False))
    # The role of each Bundle entry, in entry order, space-separated (capnote.fhir.readmodel).
    roles: str = Field(sa_column=Column(Text, nullable=False))
    reason: str | None = Field(default=None, max_length=500)
    recorded_at: datetime
    recorded_by: str = Field(max_length=LABEL_MAX)
    # The token that stored it (labels may repeat; ids do not); None before revision 0004.
    recorded_by_token: int | None = None
    # A signed version: who vouched for it and when (the Provenance attester).
    signed_by: str | None = Field(default=None, max_length=200)
    signed_by_staff: str | None = Field(default=None, max_length=320)  # system|value
    signed_at: datetime | None = None
    # What the clinical audit groups and counts by (capnote.audit), copied out of the note
    # and its derived values so that the audit is SQL aggregation; None before revision 0006
    # filled them, and for drafts kept as typed.
    site: str | None = Field(default=None, max_length=255)
    site_name: str | None = Field(default=None, max_length=200)
    performer: str | None = Field(default=None, max_length=320)  # system|value
    performer_name: str | None = Field(default=None, max_length=200)
    spike_grade: str | None = Field(default=None, max_length=8)  # None: no reading after
    glaucoma: str | None = Field(default=None, max_length=10)  # None: not recorded
    prophylaxis: bool | None = None
    cataract_days: int | None = None
    # A review visit was booked (a review among the due items); None before revision 0008
    # filled it, and for drafts kept as typed.
    review_booked: bool | None = None


class FhirIndex(SQLModel, table=True):
    """What the FHIR searches filter on, for the resources of each note version; the
    resources themselves are read from the version's Bundle. Rows of one note sit together
    under the primary key."""

    __tablename__ = "fhir_index"
    __table_args__ = (
        # Only the current rows are searched by type, status and date.
        Index(
            "ix_fhir_index_current",
            "resource_type",
            "status",
            "date",
            sqlite_where=text("latest"),
            postgresql_where=text("latest"),
        ),
        {"sqlite_with_rowid": False},
    )

    note_key: str = Field(max_length=36, primary_key=True)
    role: str = Field(max_length=40, primary_key=True)
    version: int = Field(primary_key=True)
    resource_type: str = Field(max_length=40)
    latest: bool = Field(default=True)
    status: str = Field(max_length=20)
    # The range of the resource's search date (equal ends for a moment; None for none) ...
    date: datetime | None = None
    date_end: datetime | None = None
    # ... and its start, or the first moment of year 1 when it has none: every row sorts.
    sort_at: datetime


class FhirToken(SQLModel, table=True):
    """The token values of each indexed resource (identifiers, codings of its code): a
    resource has several, so they are rows of their own beside its fhir_index row.

    Keyed by value first and then by resource, so that one tree answers both lookups a
    search makes (which resources have this value; has this resource this value) and
    each row is written to one tree only (a second index cost more than the row)."""

    __tablename__ = "fhir_token"
    __table_args__ = ({"sqlite_with_rowid": False},)

    param: str = Field(max_length=20, primary_key=True)
    code: str = Field(max_length=255, primary_key=True)
    note_key: str = Field(max_length=36, primary_key=True)
    version: int = Field(primary_key=True)
    role: str = Field(max_length=40, primary_key=True)
    system: str = Field(max_length=255, primary_key=True)


class ApiToken(SQLModel, table=True):
    """A bearer token: only its SHA-256 hash is kept."""

    __tablename__ = "api_token"

    id: int | None = Field(default=None, primary_key=True)
    token_hash: str = Field(max_length=64, unique=True)
    role: str = Field(max_length=20)
    # The display name of the person (clinician, auditor...) or system client it belongs to.
    label: str = Field(max_length=LABEL_MAX)
    created_at: datetime
    revoked_at: datetime | None = None
    # A person's staff identifier in the site's system (clinician tokens have one).
    staff_system: str | None = Field(default=None, max_length=255)
    staff_value: str | None = Field(default=None, max_length=64)
    expires_at: datetime | None = None
    last_used_at: datetime | None = None


class AuditEntry(SQLModel, table=True):
    """Who did what to which note, when and from where. Identifiers only, no clinical text."""

    __tablename__ = "audit_entry"

    id: int | None = Field(default=None, primary_key=True)
    at: datetime = Field(index=True)
    actor: str = Field(max_length=LABEL_MAX)
    role: str = Field(max_length=20)
    action: str = Field(max_length=40)
    note_key: str | None = Field(default=None, max_length=36, index=True)
    version: int | None = None
    remote: str | None = Field(default=None, max_length=REMOTE_MAX)
    outcome: str = Field(max_length=20)
    token_id: int | None = None
    # What was read or searched for (resource ids, the search's parameters): identifiers only.
    detail: str | None = Field(default=None, max_length=500)


class OutboxEntry(SQLModel, table=True):
    """A stored note version's Bundle waiting for (or done with) delivery to the receiver.

    Written in the same transaction as the note version, so neither exists without the other.
    """

    __tablename__ = "outbox_entry"
    __table_args__ = (
        UniqueConstraint("note_key", "version", name="uq_outbox_note_version"),
        Index("ix_outbox_due", "state", "next_attempt_at"),
    )

    id: int | None = Field(default=None, primary_key=True)
    note_key: str = Field(max_length=36)
    version: int
    state: str = Field(max_length=10)  # pending | delivering | delivered | failed
    attempts: int = 0
    next_attempt_at: datetime
    claimed_by: str | None = Field(default=None, max_length=64)
    claimed_until: datetime | None = None
    last_status: int | None = None
    last_error: str | None = Field(default=None, sa_column=Column(Text, nullable=True))
    created_at: datetime
    delivered_at: datetime | None = None


class ReviewVersion(SQLModel, table=True):
    """One version of one review visit record (capnote.review), with what capnote made of it.

    Linked to its laser session by the session's note key; the findings the clinical audit
    counts are copied out into columns (None: not recorded, never "no")."""

    __tablename__ = "review_version"
    __table_args__ = (
        UniqueConstraint("review_key", "version", name="uq_review_version"),
        Index("ix_review_version_session", "session_key"),
    )

    id: int | None = Field(default=None, primary_key=True)
    review_key: str = Field(max_length=36)
    version: int
    session_key: str = Field(max_length=36)
    sender_system: str = Field(max_length=255)
    sender_value: str = Field(max_length=64)
    patient_system: str = Field(max_length=255)
    patient_value: str = Field(max_length=64)
    eye: str = Field(max_length=5)
    seen_at: datetime
    status: str = Field(max_length=8)  # draft | final | void
    attended: bool
    content_hash: str = Field(max_length=64)
    review_json: str = Field(sa_column=Column(Text, nullable=False))
    result_json: str = Field(sa_column=Column(Text, nullable=False))
    bundle: bytes = Field(sa_column=Column(LargeBinary, nullable=False))
    roles: str = Field(sa_column=Column(Text, nullable=False))
    reason: str | None = Field(default=None, max_length=500)
    recorded_at: datetime
    recorded_by: str = Field(max_length=LABEL_MAX)
    recorded_by_token: int | None = None
    # What the clinical audit counts (capnote.audit): each None when not recorded.
    cystoid_macular_oedema: bool | None = None
    retinal_detachment: bool | None = None
    anterior_uveitis: bool | None = None
    raised_iop: bool | None = None
    iol_pits: bool | None = None
    retreatment: bool | None = None
    opening_adequate: bool | None = None
