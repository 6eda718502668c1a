"""Migrations from an empty database on both engines, and the tables they make match the
models (Alembic's own comparison)."""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import inspect, text
from sqlmodel import SQLModel

from capnote.store.database import make_engine, upgrade


def test_upgrade_from_empty_gives_the_models_tables(database_url: str) -> None:
    engine = make_engine(database_url)
    try:
        assert inspect(engine).get_table_names() == []
        upgrade(engine)
        upgrade(engine)  # a second start changes nothing
        assert set(inspect(engine).get_table_names()) == {
            "alembic_version",
            "note_version",
            "fhir_index",
            "fhir_token",
            "api_token",
            "audit_entry",
            "outbox_entry",
            "review_version",
        }
        with engine.connect() as connection:
            assert (
                connection.execute(text("select version_num from alembic_version")).scalar()
                == "0008"
            )
            diff = compare_metadata(MigrationContext.configure(connection), SQLModel.metadata)
        assert diff == []
    finally:
        engine.dispose()


def test_sqlite_runs_in_wal_mode(tmp_path: object) -> None:
    engine = make_engine(f"sqlite:///{tmp_path}/wal.sqlite3")
    with engine.connect() as connection:
        assert connection.execute(text("pragma journal_mode")).scalar() == "wal"
        assert connection.execute(text("pragma busy_timeout")).scalar() == 15000
    engine.dispose()
