"""Alembic environment: capnote runs migrations in-process with a connection it passes in."""

from __future__ import annotations

from alembic import context
from sqlmodel import SQLModel

import capnote.store.tables  # noqa: F401  (registers the tables on SQLModel.metadata)

connection = context.config.attributes["connection"]
context.configure(
    connection=connection,
    target_metadata=SQLModel.metadata,
    # SQLite cannot ALTER most things; batch mode rebuilds tables the portable way.
    render_as_batch=connection.dialect.name == "sqlite",
)
with context.begin_transaction():
    context.run_migrations()
