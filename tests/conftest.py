"""Shared fixtures: a store on each backend, a movable clock, an API client."""

from __future__ import annotations

import os
import shutil
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from hypothesis import settings as hypothesis_settings
from sqlalchemy import create_engine, text

from service.auth.tokens import mint
from service.clock import FixedClock
from service.config import Settings
from service.db.engine import Database
from service.main import build_context, create_app

# CI runs the property tests on a fixed sequence of examples (HYPOTHESIS_PROFILE=ci in .ci/run), so
# a red run can be repeated exactly; locally each run explores new examples, which is how the
# properties keep finding faults. A failure found locally becomes a named test of its own.
hypothesis_settings.register_profile("ci", derandomize=True, print_blob=True)
hypothesis_settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "default"))

POSTGRES_URL = os.environ.get(
    "LYTESTREAM_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)


def _postgres_reason() -> str | None:
    try:
        engine = create_engine(POSTGRES_URL, connect_args={"connect_timeout": 3})
        with engine.connect() as conn:
            conn.execute(text("SELECT 1"))
        engine.dispose()
    except Exception as exc:  # any failure to reach it means: skip, and say why
        return f"PostgreSQL not reachable at {POSTGRES_URL} ({type(exc).__name__}); set LYTESTREAM_TEST_POSTGRES_URL"
    return None


_PG_SKIP = _postgres_reason()


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A fresh, empty database URL on each backend (PostgreSQL: a schema of its own)."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'lytestream.db'}"
        return
    yield from _postgres_schema()


@pytest.fixture
def postgres_url() -> Iterator[str]:
    """A fresh schema on the PostgreSQL server, for tests that only make sense there."""
    yield from _postgres_schema()


def _postgres_schema() -> Iterator[str]:
    if _PG_SKIP:
        pytest.skip(_PG_SKIP)
    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = create_engine(POSTGRES_URL)
    with admin.begin() as conn:
        conn.execute(text(f'CREATE SCHEMA "{schema}"'))
    sep = "&" if "?" in POSTGRES_URL else "?"
    try:
        yield f"{POSTGRES_URL}{sep}options=-csearch_path%3D{schema}"
    finally:
        with admin.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


@pytest.fixture
def sqlite_url(tmp_path: Path) -> str:
    return f"sqlite:///{tmp_path / 'lytestream.db'}"


@pytest.fixture
def clock() -> FixedClock:
    return FixedClock(datetime(2026, 3, 2, 12, 0, tzinfo=UTC))


@pytest.fixture(scope="session")
def _migrated_sqlite(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One SQLite file brought to the newest migration, copied for each API test instead of migrating
    each one afresh (the migration itself is tested on an empty store in tests/db/test_migrations.py)."""
    path = tmp_path_factory.mktemp("template") / "lytestream.db"
    db = Database(f"sqlite:///{path}")
    db.create_schema()
    db.dispose()
    return path


@pytest.fixture
def settings(database_url: str, tmp_path: Path, _migrated_sqlite: Path) -> Settings:
    if database_url.startswith("sqlite:///"):
        target = Path(database_url.removeprefix("sqlite:///"))
        if not target.exists():
            shutil.copyfile(_migrated_sqlite, target)
    return Settings(database_url=database_url, data_dir=tmp_path, base_url="http://testserver/fhir", scheduler=False)


@pytest.fixture
def context(settings: Settings, clock: FixedClock):  # type: ignore[no-untyped-def]
    ctx = build_context(settings, clock=clock)
    yield ctx
    ctx.db.dispose()


FULL_SCOPE = "system/*.cruds"


def authorised_client(ctx, scope: str = FULL_SCOPE, client: str = "test-suite") -> TestClient:  # type: ignore[no-untyped-def]
    """A TestClient that sends a bearer token minted for ``scope``: every API test goes through auth."""
    with ctx.db.session(write=True) as session:
        token = mint(session, client=client, scope=scope, now=ctx.clock.now())
    return TestClient(create_app(context=ctx), headers={"Authorization": f"Bearer {token}"})


@pytest.fixture
def client(context) -> Iterator[TestClient]:  # type: ignore[no-untyped-def]
    with authorised_client(context) as c:
        yield c
