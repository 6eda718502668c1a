"""pytest side of ``tests/pg_cluster.py``: skip or fail when PostgreSQL is missing, and the
session-wide server.

To use the fixture in every test module, conftest.py imports it:
``from tests.pg_fixtures import postgres_cluster  # noqa: F401``.
"""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.pg_cluster import PG_ROOT, PgCluster, available, required


def require_postgres() -> None:
    """Skip the calling test when PostgreSQL is not installed; fail it instead in CI.

    A skip in CI would let a run whose install step silently broke count as green, so
    ``required()`` (CI=true or CAPNOTE_REQUIRE_POSTGRES=1) turns it into a failure.
    """
    if available():
        return
    reason = (
        f"PostgreSQL server binaries not found under {PG_ROOT}/*/bin (apt-get install postgresql)"
    )
    if required():
        pytest.fail(f"{reason}; required because CI=true or CAPNOTE_REQUIRE_POSTGRES=1")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def postgres_cluster() -> Iterator[PgCluster]:
    """One private server for the whole session, with the empty database ``capnote_test``.

    Tests that need a database nobody else has touched (migrations) call
    ``postgres_cluster.fresh_database(name)``: creating a database costs tens of
    milliseconds, a new server about a second.
    """
    require_postgres()
    cluster = PgCluster()
    cluster.start()
    try:
        yield cluster
    finally:
        cluster.stop()
