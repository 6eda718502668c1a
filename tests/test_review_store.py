"""The review visit records' store calls (capnote.store.review_sql) on a real SQLite file
and a real PostgreSQL server: versions read back as written, three-valued findings stay
three-valued, and a second writer of one version is refused by the database."""

from __future__ import annotations

import pytest

from capnote.store.base import AuditRow, DuplicateVersionError, Store
from capnote.store.database import migrate
from capnote.store.review_sql import ReviewRow
from tests.conftest import NOW, on_store


def _row(version: int) -> ReviewRow:
    return ReviewRow(
        review_key="k1",
        version=version,
        session_key="s1",
        sender_system="urn:example:reviews",
        sender_value="R-1",
        patient_system="urn:example:mrn",
        patient_value="P-1",
        eye="right",
        seen_at=NOW,
        status="final",
        attended=True,
        content_hash="h" * 64,
        review_json="{}",
        result_json="{}",
        bundle=b"x",
        roles="",
        reason=None,
        recorded_at=NOW,
        recorded_by="store test",
        cystoid_macular_oedema=True,
        retinal_detachment=None,
        anterior_uveitis=False,
    )


def _audit(action: str) -> AuditRow:
    return AuditRow(NOW, "store test", "clinician", action, None)


def test_review_versions_read_back_and_one_writer_wins(database_url: str) -> None:
    migrate(database_url)

    async def work(store: Store) -> tuple[ReviewRow | None, list[ReviewRow], list[str]]:
        await store.write_review(_row(1), _audit("review-create"), forward=False)
        with pytest.raises(DuplicateVersionError):
            await store.write_review(_row(1), _audit("review-create"), forward=False)
        await store.write_review(_row(2), _audit("review-amend"), forward=False)
        return (
            await store.review_latest("k1"),
            await store.reviews_of_session("s1"),
            await store.review_hashes("k1"),
        )

    latest, of_session, hashes = on_store(database_url, work)
    assert latest is not None
    assert latest.version == 2
    assert latest.seen_at == NOW
    # True, False and not recorded come back as they went in (None is never "no").
    assert latest.cystoid_macular_oedema is True
    assert latest.anterior_uveitis is False
    assert latest.retinal_detachment is None
    assert [r.version for r in of_session] == [2]
    assert len(hashes) == 2
