"""/readyz: ready only with a reachable database at this code's newest migration. /healthz: the
scheduler's jobs (the dispatcher is deliver-outbox) report their last run; a stalled one makes it 503."""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy.exc import OperationalError

from service.api.context import AppContext
from service.clock import FixedClock
from service.config import Settings
from service.db.engine import Database
from service.db.migrate import head_revisions, upgrade
from service.jobs import JOBS, run_job
from service.main import build_context, create_app
from tests.servers import free_port


def test_ready_when_the_database_answers_at_the_newest_migration(client: TestClient) -> None:
    r = client.get("/readyz")
    assert r.status_code == 200 and r.json() == {"status": "ready"}


def test_not_ready_when_the_database_is_unreachable(context: AppContext) -> None:
    good = context.db
    context.db = Database(f"postgresql+psycopg://lytestream@127.0.0.1:{free_port()}/gone")
    try:
        r = TestClient(create_app(context=context)).get("/readyz")
    finally:
        context.db.dispose()
        context.db = good
    assert r.status_code == 503
    assert "database unreachable" in r.json()["reason"]
    assert r.headers["retry-after"]


def test_not_ready_while_a_migration_is_pending(tmp_path: Path, clock: FixedClock) -> None:
    url = f"sqlite:///{tmp_path / 'old.db'}"
    old = Database(url)
    upgrade(old, "0003")  # one revision behind 0004_subscription_owner (at least)
    old.dispose()
    ctx = build_context(Settings(database_url=url, data_dir=tmp_path, scheduler=False), clock=clock, migrate=False)
    r = TestClient(create_app(context=ctx)).get("/readyz")
    assert r.status_code == 503
    reason = r.json()["reason"]
    assert "lytestream db upgrade" in reason and all(head in reason for head in head_revisions())
    ctx.db.create_schema()
    assert TestClient(create_app(context=ctx)).get("/readyz").status_code == 200
    ctx.db.dispose()


def test_healthz_reports_each_job_last_run_and_age(context: AppContext, clock: FixedClock) -> None:
    for name in JOBS:
        context.heartbeats.expect(name, timedelta(seconds=60), clock.now())
    run_job(context, "deliver-outbox")
    clock.advance(timedelta(seconds=30))
    body = TestClient(create_app(context=context)).get("/healthz").json()
    assert body["status"] == "ok"
    assert body["jobs"]["deliver-outbox"]["age_seconds"] == 30.0
    assert body["jobs"]["deliver-outbox"]["last_ok"] is True
    assert body["jobs"]["recheck-flags"]["last_run"] is None  # not run yet: aged from the start


def test_healthz_is_503_when_a_job_stops_running(context: AppContext, clock: FixedClock) -> None:
    context.heartbeats.expect("deliver-outbox", timedelta(seconds=2), clock.now())
    context.heartbeats.expect("recheck-flags", timedelta(seconds=60), clock.now())
    run_job(context, "deliver-outbox")
    run_job(context, "recheck-flags")
    clock.advance(timedelta(seconds=3 * 2 + 60 + 1))  # three intervals and the minute's margin
    r = TestClient(create_app(context=context)).get("/healthz")
    assert r.status_code == 503
    assert r.json()["jobs"]["deliver-outbox"]["stale"] is True
    assert r.json()["jobs"]["recheck-flags"]["stale"] is False


def test_a_failing_job_is_reported_as_such(context: AppContext, clock: FixedClock) -> None:
    context.heartbeats.expect("recheck-flags", timedelta(seconds=60), clock.now())
    context.db.dispose()
    broken = context.db
    context.db = Database(f"postgresql+psycopg://lytestream@127.0.0.1:{free_port()}/gone")
    try:
        with pytest.raises(OperationalError):
            run_job(context, "recheck-flags")
        body = TestClient(create_app(context=context)).get("/healthz").json()
    finally:
        context.db.dispose()
        context.db = broken
    assert body["jobs"]["recheck-flags"]["last_ok"] is False
