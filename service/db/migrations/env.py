"""Alembic environment: runs on the connection handed over by service.db.migrate."""

from __future__ import annotations

from alembic import context
from sqlmodel import SQLModel

import service.auth.tables  # noqa: F401  (registers the tables on the metadata)
import service.db.tables  # noqa: F401

config = context.config
target_metadata = SQLModel.metadata


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is None:
        from sqlalchemy import create_engine

        engine = create_engine(config.get_main_option("sqlalchemy.url") or "", hide_parameters=True)
        with engine.begin() as conn:
            context.configure(connection=conn, target_metadata=target_metadata, render_as_batch=True)
            context.run_migrations()
        return
    context.configure(connection=connection, target_metadata=target_metadata, render_as_batch=True)
    context.run_migrations()


run_migrations_online()
