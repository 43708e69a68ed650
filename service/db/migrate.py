"""Alembic, driven from code so `lytestream db upgrade`, the server and the tests share one path."""

from __future__ import annotations

from functools import lru_cache
from importlib import resources
from typing import TYPE_CHECKING

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import text

if TYPE_CHECKING:
    from service.db.engine import Database

__all__ = ["alembic_config", "head_revisions", "pending_revision", "upgrade"]


def alembic_config(url: str) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(resources.files("service.db") / "migrations"))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


def upgrade(db: Database, revision: str = "head") -> None:
    cfg = alembic_config(db.url)
    with db.engine.begin() as conn:
        if conn.dialect.name == "postgresql":
            # Replicas started together would otherwise run the same migration at once; the second
            # waits here, then finds the schema at head and does nothing. Released at commit.
            conn.execute(text("SELECT pg_advisory_xact_lock(hashtextextended(:k, 0))"), {"k": "migrate"})
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)


@lru_cache(maxsize=1)
def head_revisions() -> frozenset[str]:
    """The newest migration(s) this code ships (read once: the scripts do not change under a process)."""
    return frozenset(ScriptDirectory.from_config(alembic_config("sqlite://")).get_heads())


def pending_revision(db: Database) -> str | None:
    """None when the database is at this code's head; else what it is at ("empty" before any migration).
    One small query: it runs on every readiness probe."""
    with db.engine.connect() as conn:
        current = frozenset(MigrationContext.configure(conn).get_current_heads())
    if current == head_revisions():
        return None
    return ", ".join(sorted(current)) or "empty"
