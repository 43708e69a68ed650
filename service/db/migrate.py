"""Alembic, driven from code so `lytestream db upgrade`, the server and the tests share one path."""

from __future__ import annotations

from importlib import resources
from typing import TYPE_CHECKING

from alembic import command
from alembic.config import Config

if TYPE_CHECKING:
    from service.db.engine import Database

__all__ = ["alembic_config", "upgrade"]


def alembic_config(url: str) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(resources.files("service.db") / "migrations"))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


def upgrade(db: Database, revision: str = "head") -> None:
    cfg = alembic_config(db.url)
    with db.engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, revision)
