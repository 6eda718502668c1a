"""The throwaway PostgreSQL server of tests/pg_cluster.py, used for real.

These tests make their own servers instead of using the session fixture: one of them
checks what stop() leaves behind, which a shared server cannot show.
"""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import psycopg
import pytest
import sqlalchemy as sa

from tests import pg_fixtures
from tests.pg_cluster import NEEDED, PgCluster, PgClusterError, find_bindir, required
from tests.pg_fixtures import require_postgres


@pytest.fixture(scope="module")
def cluster() -> Iterator[PgCluster]:
    require_postgres()
    with PgCluster() as server:
        yield server


def scalar(url: str, sql: str) -> object:
    """One value from a fresh SQLAlchemy engine, disposed at once (no pooled sockets)."""
    engine = sa.create_engine(url)
    try:
        with engine.connect() as conn:
            return conn.execute(sa.text(sql)).scalar_one()
    finally:
        engine.dispose()


@pytest.mark.postgres
def test_select_version_over_the_socket(cluster: PgCluster) -> None:
    with psycopg.connect(cluster.conninfo()) as conn:
        row = conn.execute("select version()").fetchone()
    assert row is not None
    assert str(row[0]).startswith("PostgreSQL ")
    # The SQLAlchemy URL reaches the same server and database, by the socket (no address).
    assert scalar(cluster.url, "select current_database()") == "capnote_test"
    assert scalar(cluster.url, "select inet_server_addr() is null") is True
    assert scalar(cluster.url, "show fsync") == "off"


@pytest.mark.postgres
def test_tcp_url_uses_loopback(cluster: PgCluster) -> None:
    assert scalar(cluster.tcp_url, "select host(inet_server_addr())") == "127.0.0.1"
    assert scalar(cluster.tcp_url, "select inet_server_port()") == cluster.port


@pytest.mark.postgres
def test_fresh_database_is_empty_and_usable(cluster: PgCluster) -> None:
    url = cluster.fresh_database("capnote_fresh")
    assert url == cluster.url_for("capnote_fresh")
    tables = "select count(*) from pg_tables where schemaname = 'public'"
    assert scalar(url, tables) == 0
    engine = sa.create_engine(url)
    try:
        with engine.begin() as conn:
            conn.execute(sa.text("create table note (id serial primary key, body text)"))
            conn.execute(sa.text("insert into note (body) values ('Ümlaut and ü')"))
        with engine.connect() as conn:
            assert conn.execute(sa.text("select upper(body) from note")).scalar_one() == (
                "ÜMLAUT AND Ü"
            )
    finally:
        engine.dispose()
    # The table went to the new database only.
    assert scalar(cluster.url, tables) == 0
    with pytest.raises(PgClusterError, match="already exists"):
        cluster.fresh_database("capnote_fresh")


@pytest.mark.postgres
def test_restart_cuts_connections_and_keeps_data(cluster: PgCluster) -> None:
    url = cluster.fresh_database("capnote_restart")
    port = cluster.port
    conninfo = cluster.conninfo("capnote_restart")
    with psycopg.connect(conninfo, autocommit=True) as conn:
        conn.execute("create table kept (n int)")
        conn.execute("insert into kept values (1)")
    with psycopg.connect(conninfo) as conn:
        cluster.restart()
        with pytest.raises(psycopg.OperationalError):
            conn.execute("select 1")
    assert cluster.port == port
    assert scalar(url, "select n from kept") == 1
    # An immediate stop is a crash to the server: it must come back through recovery.
    cluster.restart("immediate")
    assert scalar(url, "select count(*) from kept") == 1


@pytest.mark.postgres
def test_stop_removes_the_server_and_its_files(cluster: PgCluster) -> None:
    other = PgCluster(settings={"max_connections": "7"})
    other.start()
    # Beside the module's server: its own port and socket, so runs cannot clash.
    assert other.port != cluster.port
    assert other.socket_dir != cluster.socket_dir
    assert set(other.timings) == {"initdb", "start", "createdb", "total"}
    conninfo = other.conninfo()
    assert scalar(other.url, "show max_connections") == "7"
    base = other.data_dir.parent
    if os.geteuid() == 0:
        # Handed to the postgres user, since initdb and the server refuse root.
        assert base.stat().st_uid != 0
        assert other.data_dir.stat().st_uid == base.stat().st_uid
    other.stop()
    assert not base.exists()
    assert not other.running
    with pytest.raises(psycopg.OperationalError):
        psycopg.connect(conninfo, connect_timeout=5).close()
    other.stop()  # a second stop is a no-op
    with pytest.raises(PgClusterError, match="not started"):
        _ = other.url


# -- the helper's logic, no server needed -------------------------------------------------


def _fake_bindir(root: Path, version: str, programs: tuple[str, ...] = NEEDED) -> Path:
    bindir = root / version / "bin"
    bindir.mkdir(parents=True)
    for name in programs:
        program = bindir / name
        program.write_text("#!/bin/sh\n")
        program.chmod(program.stat().st_mode | stat.S_IXUSR)
    return bindir


def test_find_bindir_takes_the_highest_complete_version(tmp_path: Path) -> None:
    assert find_bindir(tmp_path) is None
    _fake_bindir(tmp_path, "9.6")
    fifteen = _fake_bindir(tmp_path, "15")
    # Only a client package of 16 installed: no server, so not usable.
    _fake_bindir(tmp_path, "16", programs=("createdb",))
    assert find_bindir(tmp_path) == fifteen


@pytest.mark.parametrize(
    ("ci", "require", "expected"),
    [
        (None, None, False),
        ("true", None, True),
        ("false", None, False),
        (None, "1", True),
        (None, "0", False),
    ],
)
def test_required_follows_the_environment(
    monkeypatch: pytest.MonkeyPatch, ci: str | None, require: str | None, expected: bool
) -> None:
    for name, value in (("CI", ci), ("CAPNOTE_REQUIRE_POSTGRES", require)):
        if value is None:
            monkeypatch.delenv(name, raising=False)
        else:
            monkeypatch.setenv(name, value)
    assert required() is expected


def test_missing_postgres_skips_locally_and_fails_in_ci(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(pg_fixtures, "available", lambda: False)
    monkeypatch.delenv("CI", raising=False)
    monkeypatch.delenv("CAPNOTE_REQUIRE_POSTGRES", raising=False)
    with pytest.raises(pytest.skip.Exception):
        require_postgres()
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception):
        require_postgres()


def test_database_names_are_plain_identifiers() -> None:
    with pytest.raises(ValueError, match="database name"):
        PgCluster(database="notes'; drop table x")
    with pytest.raises(PgClusterError, match="not started"):
        PgCluster().fresh_database("ok_name")
