"""The Alembic migrations build exactly the schema the tables declare, on each backend."""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlmodel import SQLModel

import service.auth.tables  # noqa: F401
import service.db.tables  # noqa: F401
from service.db.engine import Database


def test_migrations_match_the_table_definitions(database_url: str) -> None:
    db = Database(database_url)
    db.create_schema()
    with db.engine.connect() as conn:
        diff = compare_metadata(MigrationContext.configure(conn), SQLModel.metadata)
    db.dispose()
    assert diff == []
