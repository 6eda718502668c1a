"""The store (capnote.store.base) on real databases: what it writes reads back through the
ORM's table definitions, tokens, the audit trail and the outbox keep their promises on both
engines, a SQLite writer that meets a held lock waits without stopping the event loop, WAL
checkpoints run off the request path, and stored rows from the previous layout are
converted by migrations 0003 and 0005."""

from __future__ import annotations

import asyncio
import json
import sqlite3
import threading
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import orjson
import pytest
from alembic import command
from alembic.config import Config
from fastapi.testclient import TestClient
from sqlalchemy import text
from sqlmodel import Session, select

from capnote.app import create_app
from capnote.assess import Assessor
from capnote.config import Settings
from capnote.fhir.common import stable_uuid
from capnote.fhir.readmodel import ROLE_MAX, parse_id, resource_id, searchables
from capnote.note import Note
from capnote.notes import NoteService, Principal, content_hash, note_key
from capnote.policy import load_policy
from capnote.store.base import FAILED, PENDING, Store
from capnote.store.codec import pack_bundle, pack_roles, unpack_bundle, unpack_roles
from capnote.store.database import MIGRATIONS, make_engine, migrate, open_store, upgrade
from capnote.store.sqlite import SqliteStore
from capnote.store.tables import FhirIndex, FhirToken, NoteVersion
from tests.conftest import NOW, VALID, on_store, routine, sync_notes

WHO = Principal("store test", "submitter")


def service_on(url: str) -> NoteService:
    """A NoteService on a SQLite file (these tests are SQLite's own)."""
    migrate(url)
    return NoteService(SqliteStore(url), Assessor(load_policy()), lambda: NOW)


def utc(moment: datetime) -> datetime:
    """A time the ORM read back, as aware UTC (SQLite keeps it naive)."""
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def test_a_written_version_reads_back_through_the_orm(database_url: str) -> None:
    notes = sync_notes(database_url)
    service = notes.service
    engine = make_engine(database_url)
    try:
        _created, stored = notes.submit(VALID[0].read_bytes(), WHO)
        with Session(engine) as session:
            row = session.exec(select(NoteVersion)).one()
            index = session.exec(select(FhirIndex)).all()
        latest = notes.run(service.store.latest(stored.key))
        assert latest is not None
        # Times as the ORM reads what the driver wrote, and back.
        assert utc(row.recorded_at) == NOW == latest.recorded_at
        assert utc(row.started_at) == latest.started_at
        assert unpack_bundle(bytes(row.bundle)) == stored.bundle_json
        # Every resource the read API searches is indexed (each version's Provenance is
        # read by id, not searched).
        entries = [
            e
            for e in orjson.loads(stored.bundle_json)["entry"]
            if e["resource"]["resourceType"] != "Provenance"
        ]
        assert len(index) == len(entries)
        assert {(i.resource_type, i.latest) for i in index} == {
            (e["resource"]["resourceType"], True) for e in entries
        }
        assert {i.resource_type for i in index} >= {"Procedure", "Observation", "ServiceRequest"}
    finally:
        notes.close()
        engine.dispose()


def test_tokens_audit_and_outbox_on_both_engines(database_url: str) -> None:
    notes = sync_notes(database_url, forward=True)
    store = notes.store
    try:
        token, token_id = notes.run(store.new_token("auditor", "desk 3", NOW))
        assert token.startswith("cap_")
        [info] = notes.run(store.tokens())
        assert (info.id, info.role, info.label, info.created_at) == (
            token_id,
            "auditor",
            "desk 3",
            NOW,
        )
        assert notes.run(store.revoke_token(token_id, NOW))
        assert not notes.run(store.revoke_token(token_id, NOW))  # already revoked
        assert notes.run(store.tokens())[0].revoked_at == NOW
        _created, stored = notes.submit(routine_bytes(), WHO)
        [entry] = notes.run(store.audit_entries(stored.key, 0, 10))
        assert (entry.actor, entry.action, entry.version, entry.at) == (WHO.label, "create", 1, NOW)
        assert notes.run(store.audit_entries(None, 1, 10)) == []  # the second page is empty
        # The outbox: claimed once, then not again while the lease holds.
        claimed = notes.run(store.claim("w1", NOW, timedelta(minutes=2), 10))
        assert [(e.note_key, e.state, e.attempts) for e in claimed] == [
            (stored.key, "delivering", 1)
        ]
        assert notes.run(store.claim("w2", NOW, timedelta(minutes=2), 10)) == []
        later = NOW + timedelta(minutes=3)  # the lease ran out: another worker may take it
        [again] = notes.run(store.claim("w2", later, timedelta(minutes=2), 10))
        assert again.attempts == 2
        assert not notes.run(store.delivered(again.id, "w1", 200, later))  # w1 lost it
        assert notes.run(store.retry_later(again.id, "w2", 503, "busy", later))
        assert notes.run(store.outbox(PENDING, 10))[0].last_error == "busy"
        assert notes.run(store.operator_set(again.id, FAILED, later))
        assert [e.state for e in notes.run(store.outbox_of_note(stored.key))] == ["failed"]
        assert notes.run(store.operator_set(again.id, PENDING, later))
        [last] = notes.run(store.claim("w3", later, timedelta(minutes=2), 10))
        assert notes.run(store.delivered(last.id, "w3", 200, later))
        assert not notes.run(store.operator_set(last.id, PENDING, later))  # delivered stays
        bundle = notes.run(store.bundle_of(last))
        assert unpack_bundle(bundle) == stored.bundle_json
    finally:
        notes.close()


def test_two_stores_never_claim_one_entry_twice(database_url: str) -> None:
    # Two stores are two connections (two processes' workers): the claim is one statement
    # whose condition is checked on the row (and, on PostgreSQL, SKIP LOCKED).
    notes = sync_notes(database_url, forward=True)
    try:
        for i in range(20):
            data = routine()
            data["note_id"]["value"] = f"LN-CLAIM-{i}"
            notes.submit(json.dumps(data).encode(), WHO)
    finally:
        notes.close()

    async def race() -> list[int]:
        stores: list[Store] = [open_store(database_url) for _ in range(3)]
        try:
            batches = await asyncio.gather(
                *(
                    s.claim(f"w{n}-{k}", NOW, timedelta(minutes=2), 3)
                    for k in range(4)
                    for n, s in enumerate(stores)
                )
            )
            return [e.id for batch in batches for e in batch]
        finally:
            for s in stores:
                await s.aclose()

    ids = asyncio.run(race())
    assert len(ids) == len(set(ids))  # nobody got an entry another had
    assert len(ids) == 20  # 12 claims of up to 3 took every one of the 20
    assert on_store(database_url, lambda s: s.outbox(PENDING, 100)) == []


def test_concurrent_writes_share_one_commit_and_a_duplicate_fails_alone(tmp_path: Path) -> None:
    # Group commit: the submissions that reach the store in one turn of the event loop are
    # one transaction, each in a savepoint; a second writer of the same note loses alone.
    service = service_on(f"sqlite:///{tmp_path / 'group.sqlite3'}")
    store = sqlite_of(service)
    statements: list[str] = []

    def bodies() -> list[bytes]:
        out = []
        for i in range(8):
            data = routine()
            data["note_id"]["value"] = f"LN-GROUP-{i}"
            data["patient"]["value"] = f"PT-GROUP-{i}"
            out.append(json.dumps(data).encode())
        return [*out, out[0]]  # the first note twice

    async def scenario() -> list[bool]:
        await store.ping()  # the connection exists, so the trace sees every statement
        store._open().set_trace_callback(statements.append)
        results = await asyncio.gather(*(service.submit(b, WHO) for b in bodies()))
        store._open().set_trace_callback(None)
        return [created for created, _stored in results]

    try:
        created = asyncio.run(scenario())
    finally:
        store.close()
    assert created == [True] * 8 + [False]  # the repeat is a resend, answered as such
    commits = [s for s in statements if s == "COMMIT"]
    assert len(commits) == 1, statements  # all nine writes in one transaction
    assert sum(s == "ROLLBACK TO one_write" for s in statements) == 1
    with sqlite3.connect(tmp_path / "group.sqlite3") as connection:
        assert connection.execute("select count(*) from note_version").fetchone() == (8,)


def test_a_held_write_lock_is_waited_for_without_stopping_the_loop(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'locked.sqlite3'}"
    service = service_on(url)
    other = sqlite3.connect(
        tmp_path / "locked.sqlite3", isolation_level=None, check_same_thread=False
    )
    other.execute("BEGIN IMMEDIATE")  # another process's writer, holding the lock
    ticks = 0

    async def scenario() -> bool:
        nonlocal ticks

        async def ticker() -> None:
            nonlocal ticks
            while True:
                ticks += 1
                await asyncio.sleep(0.01)

        tick = asyncio.create_task(ticker())
        # Release the lock after 0.3 s, from another thread, as the other process would.
        threading.Timer(0.3, lambda: other.execute("COMMIT")).start()
        created, _stored = await service.submit(routine_bytes(), WHO)
        tick.cancel()
        return created

    try:
        began = time.monotonic()
        assert asyncio.run(scenario())
        assert time.monotonic() - began >= 0.25  # it did wait for the lock ...
        assert ticks >= 10  # ... and the loop went on meanwhile
    finally:
        other.close()
        sqlite_of(service).close()


def sqlite_of(service: NoteService) -> SqliteStore:
    assert isinstance(service.store, SqliteStore)
    return service.store


def routine_bytes() -> bytes:
    return json.dumps(routine()).encode()


def test_checkpoints_copy_the_log_into_the_database(tmp_path: Path) -> None:
    path = tmp_path / "ckpt.sqlite3"
    service = service_on(f"sqlite:///{path}")
    asyncio.run(service.store.start())
    before = path.stat().st_size
    for i in range(30):
        data = routine()
        data["note_id"]["value"] = f"LN-CKPT-{i}"
        asyncio.run(service.submit(json.dumps(data).encode(), WHO))
    sqlite_of(service).close()  # stops the checkpoints, with a last one
    assert path.stat().st_size > before  # pages reached the database file
    with sqlite3.connect(path) as connection:
        # A reader that opens the file finds every note.
        assert connection.execute("select count(*) from note_version").fetchone() == (30,)


def checkpoint_threads() -> set[threading.Thread]:
    return {t for t in threading.enumerate() if t.name == "capnote-checkpoint"}


def test_the_app_checkpoints_in_a_thread_of_its_own(tmp_path: Path) -> None:
    app = create_app(Settings(database_url=f"sqlite:///{tmp_path / 'app.sqlite3'}"))
    others = checkpoint_threads()  # other tests' apps may still be closing theirs
    with TestClient(app):
        mine = checkpoint_threads() - others
        assert len(mine) == 1
    assert not mine & checkpoint_threads()  # stopped with the app


@pytest.mark.parametrize("path", VALID, ids=lambda p: p.name)
def test_roles_name_resources_within_fhir_id_limits(assessor: Assessor, path: Path) -> None:
    # FHIR R4 id datatype: [A-Za-z0-9\-\.]{1,64} (spec, datatypes "id").
    result = assessor.assess(path.read_bytes(), NOW)
    assert result.note is not None
    key = note_key(result.note)
    for role in result.roles:
        assert len(role) <= ROLE_MAX
        rid = resource_id(key, role)
        assert len(rid) <= 64
        assert parse_id(rid) == (key, role)


def test_codec_round_trips(assessor: Assessor) -> None:
    result = assessor.assess(VALID[0].read_bytes(), NOW)
    assert result.bundle is not None
    raw = orjson.dumps(result.bundle)
    packed = pack_bundle(raw)
    assert len(packed) < len(raw) / 3
    assert unpack_bundle(packed) == raw
    kinds = [e["resource"]["resourceType"] for e in result.bundle["entry"]]
    assert unpack_roles(pack_roles(kinds, result.roles)) == tuple(
        zip(kinds, result.roles, strict=True)
    )


def _as_of_revision_0002(
    note: Note, bundle: dict[str, Any], roles: tuple[str, ...]
) -> tuple[dict[str, Any], tuple[str, ...]]:
    """The Bundle as capnote emitted it when 0003 was written: repeated items were named by
    their position (iop-after-0, series-0, prophylaxis-0-before, take-home-0), each UUID
    being uuid5 of the note identifier and that role."""
    counts: dict[str, int] = {}
    drops: dict[str, int] = {}
    old_roles = []
    for role in roles:
        prefix = next(
            (p for p in ("iop-after", "series", "take-home") if role.startswith(p + "-")), None
        )
        if prefix is not None:
            old_roles.append(f"{prefix}-{counts.setdefault(prefix, 0)}")
            counts[prefix] += 1
        elif role.startswith("prophylaxis-"):
            index = drops.setdefault(role.rsplit("-", 1)[0], len(drops))
            old_roles.append(
                f"prophylaxis-{index}-{'before' if role.endswith('-pre') else 'after'}"
            )
        else:
            old_roles.append(role)
    text_form = orjson.dumps(bundle).decode()
    for new, old in zip(roles, old_roles, strict=True):
        text_form = text_form.replace(stable_uuid(note, new), stable_uuid(note, old))
    return orjson.loads(text_form), tuple(old_roles)


def test_migration_0003_converts_stored_versions(database_url: str) -> None:
    # A store at revision 0002 holding a version in the old layout (Bundle as text).
    engine = make_engine(database_url)
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    with engine.begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, "0002")
    assessor = Assessor(load_policy())
    result = assessor.assess(VALID[0].read_bytes(), NOW)
    assert result.note is not None
    assert result.bundle is not None
    key = note_key(result.note)
    note_json = result.note.model_dump_json(exclude_none=True)
    old_bundle, old_roles = _as_of_revision_0002(result.note, result.bundle, result.roles)
    with engine.begin() as connection:
        connection.execute(
            text(
                "insert into note_version (note_key, version, sender_system, sender_value, "
                "patient_system, patient_value, eye, started_at, status, total_energy_mj, "
                "content_hash, note_json, result_json, bundle_json, reason, recorded_at, "
                "recorded_by) values (:k, 1, :ss, :sv, :ps, :pv, :eye, :at, 'final', 1.0, "
                "'old', :nj, '{}', :bj, null, :at, 'old layout')"
            ),
            {
                "k": key,
                "ss": result.note.note_id.system,
                "sv": result.note.note_id.value,
                "ps": result.note.patient.system,
                "pv": result.note.patient.value,
                "eye": result.note.eye,
                "at": NOW,
                "nj": note_json,
                "bj": orjson.dumps(old_bundle).decode(),
            },
        )
    upgrade(engine)
    with Session(engine) as session:
        row = session.exec(select(NoteVersion)).one()
        index = session.exec(select(FhirIndex)).all()
        tokens = session.exec(select(FhirToken)).all()
    engine.dispose()
    assert orjson.loads(unpack_bundle(bytes(row.bundle))) == old_bundle
    assert tuple(r for _k, r in unpack_roles(row.roles)) == old_roles
    assert row.content_hash == content_hash(note_json)
    # Migration 0005 then indexed every resource, as the running service indexes one: its
    # frozen copy of the extraction agrees with capnote.fhir.readmodel.
    expected = searchables(old_bundle, old_roles)
    assert sorted(i.role for i in index) == sorted(old_roles) == sorted(e.role for e in expected)
    assert all(i.latest for i in index)
    by_role = {i.role: i for i in index}
    for e in expected:
        got = by_role[e.role]
        assert (got.resource_type, got.status) == (e.resource_type, e.status)
        assert [None if t is None else utc(t) for t in (got.date, got.date_end)] == [
            e.date,
            e.date_end,
        ]
        assert utc(got.sort_at) == e.sort_at
    assert sorted((t.role, t.param, t.system, t.code) for t in tokens) == sorted(
        (e.role, *t) for e in expected for t in e.tokens
    )


def test_the_sqlite_files_are_private(tmp_path: Path) -> None:
    """The database, its -wal and its -shm hold patient data and token hashes: owner only,
    whatever the umask (the security tester found 0644)."""
    import os
    import stat

    path = tmp_path / "private.sqlite3"
    old = os.umask(0o022)
    try:
        notes = sync_notes(f"sqlite:///{path}")
        try:
            notes.submit(VALID[0].read_bytes(), WHO)
            files = [path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")]
            assert all(f.exists() for f in files)
            for f in files:
                assert stat.S_IMODE(f.stat().st_mode) == 0o600, f
        finally:
            notes.close()
    finally:
        os.umask(old)


def _log_frames(path: Path) -> int:
    """Frames in the write-ahead log, as a passive checkpoint reports them."""
    connection = sqlite3.connect(path, isolation_level=None)
    try:
        row = connection.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()
        return int(row[1])
    finally:
        connection.close()


def test_the_log_starts_over_in_a_lull_not_under_writing(tmp_path: Path) -> None:
    """The restarting checkpoint holds the write lock through a sync, so it waits for a
    moment without writes (or the hard cap); then the log starts over."""
    from capnote.store.sqlite import Checkpointer

    path = tmp_path / "wal.sqlite3"
    writer = sqlite3.connect(path, isolation_level=None)
    writer.execute("PRAGMA journal_mode=WAL")
    writer.execute("PRAGMA wal_autocheckpoint=0")
    writer.execute("create table t (x blob)")

    class Small(Checkpointer):
        INTERVAL_S = 0.05
        RESTART_FRAMES = 40
        HARD_FRAMES = 100_000

    checkpointer = Small(str(path))
    checkpointer.start()
    try:
        deadline = time.monotonic() + 1.0
        while time.monotonic() < deadline:  # writing without a pause of one interval
            writer.execute("insert into t values (randomblob(3000))")
            time.sleep(0.002)
        busy = _log_frames(path)
        assert busy > Small.RESTART_FRAMES  # not restarted while the writes went on
        time.sleep(0.5)  # a lull: the restart runs
        writer.execute("insert into t values (randomblob(3000))")  # the log starts over
        assert _log_frames(path) < Small.RESTART_FRAMES
    finally:
        checkpointer.stop()
        writer.close()
