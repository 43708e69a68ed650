"""Engines, sessions and per-patient serialisation for SQLite and PostgreSQL.

SQLite: WAL, synchronous=FULL (a committed 2xx survives a crash), and writers open with
``BEGIN IMMEDIATE`` so one writer runs at a time while readers carry on. Writers first queue on a
lock of our own (a thread lock plus an ``flock`` on a file beside the database, so worker processes
queue too): a waiting writer then wakes the moment the lock is free, instead of sleeping in
SQLite's busy handler, which left the database idle and gave multi-second tail latencies. PostgreSQL: writers take a
transaction-scoped advisory lock per patient, in key order so two requests cannot deadlock.

A unit of work that still loses a deadlock or a serialisation check (PostgreSQL SQLSTATE 40P01,
40001) is rolled back and run again whole (``Database.unit_of_work``, bounded); if it keeps losing,
``StoreBusy`` says so, and the API answers 503 with Retry-After rather than a 500.
"""

from __future__ import annotations

import fcntl
import logging
import os
import random
import threading
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager, nullcontext
from pathlib import Path
from typing import Any, TypeVar

from sqlalchemy import Engine, create_engine, event, text
from sqlalchemy.engine import make_url
from sqlalchemy.exc import DBAPIError
from sqlmodel import Session

from service.ops.metrics import WRITER_WAIT

__all__ = ["Database", "StoreBusy", "transient_sqlstate"]

T = TypeVar("T")
log = logging.getLogger("lytestream.db")

# deadlock_detected, serialization_failure: the transaction lost a race, not a fault of its data.
_TRANSIENT = frozenset({"40P01", "40001"})
_ATTEMPTS = 5  # waits of at most 20, 40, 80, 160 ms between them


class StoreBusy(Exception):
    """A unit of work lost a deadlock or serialisation race on every attempt: nothing was stored."""


def transient_sqlstate(exc: BaseException) -> str | None:
    """The SQLSTATE when ``exc`` is a lost race that running the work again can win, else None."""
    if isinstance(exc, DBAPIError):
        code = getattr(exc.orig, "sqlstate", None)
        if code in _TRANSIENT:
            return str(code)
    return None


class Database:
    """The service's handle on its store. One per process.

    Engines hide SQL parameters (``hide_parameters``): they are patient aliases, identifiers and
    values, and SQLAlchemy would otherwise put them in every error message and echo line.
    """

    def __init__(self, url: str, *, echo: bool = False) -> None:
        self.url = url
        parsed = make_url(url)
        self.is_sqlite = parsed.get_backend_name() == "sqlite"
        if self.is_sqlite:
            if parsed.database and parsed.database != ":memory:":
                Path(parsed.database).parent.mkdir(parents=True, exist_ok=True)
            self.engine = create_engine(
                url, echo=echo, hide_parameters=True, connect_args={"check_same_thread": False, "timeout": 60}
            )
            _configure_sqlite(self.engine)
        else:
            self.engine = create_engine(url, echo=echo, hide_parameters=True, pool_size=10, max_overflow=10,
                                        pool_pre_ping=True)
        self._write_engine = self.engine.execution_options(sqlite_begin="IMMEDIATE")
        self._writer = _WriterLock(parsed.database) if self.is_sqlite else None

    @contextmanager
    def session(self, *, write: bool = False) -> Iterator[Session]:
        """A unit of work: commits on success, rolls back on any exception."""
        queued = time.perf_counter()
        with self._writer if write and self._writer is not None else nullcontext():
            if write and self._writer is not None:
                WRITER_WAIT.observe(time.perf_counter() - queued)
            session = Session(self._write_engine if write else self.engine, expire_on_commit=False)
            try:
                yield session
                session.commit()
            except BaseException:
                session.rollback()
                raise
            finally:
                session.close()

    def unit_of_work(self, work: Callable[[Session], T]) -> T:
        """``work`` in one write unit of work; run again whole if it loses a deadlock or serialisation race.

        ``work`` must start from scratch each time (everything it wrote was rolled back).
        """
        for attempt in range(1, _ATTEMPTS + 1):
            try:
                with self.session(write=True) as session:
                    return work(session)
            except DBAPIError as exc:
                code = transient_sqlstate(exc)
                if code is None:
                    raise
                log.warning("unit of work lost a race (SQLSTATE %s), attempt %d of %d", code, attempt, _ATTEMPTS)
                if attempt == _ATTEMPTS:
                    raise StoreBusy(f"lost a database race {_ATTEMPTS} times (SQLSTATE {code})") from exc
                # Jittered, so two requests that deadlocked do not meet again at the same moment.
                time.sleep(random.uniform(0.0, 0.01 * 2**attempt))
        raise AssertionError("unreachable")

    def lock_patients(self, session: Session, patient_keys: Iterable[str]) -> None:
        """Serialise work on these patients until the transaction ends.

        SQLite needs nothing more: BEGIN IMMEDIATE already made this the only writer.
        """
        if self.is_sqlite:
            return
        for key in sorted(set(patient_keys)):
            session.execute(text("SELECT pg_advisory_xact_lock(hashtextextended(:k, 0))"), {"k": key})

    def create_schema(self) -> None:
        """Bring the schema to the newest migration."""
        from service.db.migrate import upgrade

        upgrade(self)

    def dispose(self) -> None:
        self.engine.dispose()


class _WriterLock:
    """One SQLite writer at a time across the threads and processes of this host."""

    def __init__(self, database: str | None) -> None:
        self._thread = threading.Lock()
        self._path = f"{database}.writer-lock" if database and database != ":memory:" else None
        self._fd: int | None = None

    def __enter__(self) -> None:
        self._thread.acquire()
        if self._path is not None:
            if self._fd is None:
                self._fd = os.open(self._path, os.O_RDWR | os.O_CREAT, 0o600)
            fcntl.flock(self._fd, fcntl.LOCK_EX)

    def __exit__(self, *exc: object) -> None:
        if self._fd is not None:
            fcntl.flock(self._fd, fcntl.LOCK_UN)
        self._thread.release()


def _configure_sqlite(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # Let SQLAlchemy, not the sqlite3 module, decide when transactions begin (savepoints need it).
        dbapi_connection.isolation_level = None
        cur = dbapi_connection.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=FULL")
        # 32 MiB of page cache per connection (the default is 2 MiB): with a million results stored,
        # index pages of the hot tables stay in memory. Measured in bench/ at 1 M stored.
        cur.execute("PRAGMA cache_size=-32768")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        mode = conn.get_execution_options().get("sqlite_begin", "DEFERRED")
        conn.exec_driver_sql(f"BEGIN {mode}")
