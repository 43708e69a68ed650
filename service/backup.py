"""Backup and restore of the embedded SQLite store; PostgreSQL is left to its own tools.

A backup is taken with SQLite's online backup API in one step, that is inside one read transaction:
it is the store as of one commit, while the service goes on writing (WAL lets writers proceed). It
is written beside the target and renamed into place, so a half-written file never bears the name.
A restore checks that the file is a lytestream store at a migration this version knows, refuses to
replace a store that holds data unless forced, copies it in with the same API, then migrates it.
"""

from __future__ import annotations

import os
import sqlite3
from contextlib import closing
from dataclasses import dataclass
from pathlib import Path

from sqlalchemy.engine import make_url

__all__ = ["BackupError", "StoreInfo", "backup_sqlite", "inspect_store", "pg_dump_hint", "restore_sqlite",
           "sqlite_path"]

# Tables every lytestream store has had since its first migration.
_CORE_TABLES = frozenset({"observation", "fhir_version", "flag", "patient_alias", "received_request", "audit_event"})


class BackupError(Exception):
    """A backup or restore that cannot be done as asked; the message says why, in one line."""


@dataclass(frozen=True, slots=True)
class StoreInfo:
    revision: str
    rows: int  # rows in the service's tables (the migration marker not counted)


def sqlite_path(url: str) -> Path | None:
    """The file of a SQLite URL; None for any other backend."""
    parsed = make_url(url)
    if parsed.get_backend_name() != "sqlite":
        return None
    if not parsed.database or parsed.database == ":memory:":
        raise BackupError("an in-memory SQLite store has nothing on disk to back up")
    return Path(parsed.database)


def pg_dump_hint(url: str, file: Path) -> str:
    """The pg_dump command for this database (password withheld), for PostgreSQL deployments."""
    parsed = make_url(url).set(drivername="postgresql")
    return (f"pg_dump --format=custom --file {file} "
            f"'{parsed.render_as_string(hide_password=True)}'   # restore: pg_restore --clean --dbname …")


def known_revisions() -> frozenset[str]:
    from alembic.script import ScriptDirectory

    from service.db.migrate import alembic_config

    return frozenset(s.revision for s in ScriptDirectory.from_config(alembic_config("sqlite://")).walk_revisions())


def inspect_store(path: Path) -> StoreInfo:
    """What the file holds, or BackupError when it is not a lytestream store this version can take."""
    if not path.is_file():
        raise BackupError(f"{path}: no such file")
    try:
        with closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True)) as conn:
            tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            if "alembic_version" not in tables or not _CORE_TABLES <= tables:
                raise BackupError(f"{path}: a SQLite file, but not a lytestream store (its tables are missing)")
            revisions = [r[0] for r in conn.execute("SELECT version_num FROM alembic_version")]
            rows = sum(conn.execute(f'SELECT count(*) FROM "{t}"').fetchone()[0]
                       for t in sorted(tables - {"alembic_version"}) if not t.startswith("sqlite_"))
    except sqlite3.DatabaseError as exc:
        raise BackupError(f"{path}: not a SQLite database ({exc})") from exc
    if len(revisions) != 1 or revisions[0] not in known_revisions():
        raise BackupError(f"{path}: at migration {', '.join(revisions) or 'none'}, which this version does not "
                          "know (a store from a newer lytestream?)")
    return StoreInfo(revision=revisions[0], rows=rows)


def backup_sqlite(url: str, target: Path) -> StoreInfo:
    """Copy the store at ``url`` to ``target`` (which must not exist) as of one commit."""
    source = sqlite_path(url)
    if source is None:
        raise BackupError("not a SQLite store")
    if not source.is_file():
        raise BackupError(f"no store at {source}")
    if target.exists():
        raise BackupError(f"{target} exists; choose a new file name (a backup never overwrites)")
    partial = target.with_name(f".{target.name}.partial")
    try:
        with closing(sqlite3.connect(source, timeout=60)) as src, closing(sqlite3.connect(partial)) as dst:
            src.backup(dst)  # pages=-1: one step, one read transaction, a consistent copy
            dst.execute("PRAGMA journal_mode=DELETE")  # one self-contained file, no -wal beside it
        os.replace(partial, target)
    finally:
        partial.unlink(missing_ok=True)
    return inspect_store(target)


def restore_sqlite(backup: Path, url: str, *, force: bool = False) -> StoreInfo:
    """Replace the store at ``url`` with ``backup``; a store holding data only with ``force``."""
    info = inspect_store(backup)
    target = sqlite_path(url)
    if target is None:
        raise BackupError("not a SQLite store")
    if target.exists() and not force:
        try:
            held = inspect_store(target).rows
        except BackupError:
            held = 1  # something that is not an empty store of ours: never overwritten unasked
        if held:
            raise BackupError(f"{target} holds data ({held} rows); stop the service and pass --force to replace it")
    target.parent.mkdir(parents=True, exist_ok=True)
    with closing(sqlite3.connect(backup)) as src, closing(sqlite3.connect(target, timeout=60)) as dst:
        src.backup(dst)
    return info
