"""Concurrent requests for one patient end as serial ones would; nothing is lost or doubled."""

from __future__ import annotations

import logging
import random
import threading
import time
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import orjson
import pytest
from sqlalchemy import create_engine, func, select, text

from service.api.context import AppContext
from service.clock import FixedClock
from service.config import Settings
from service.db.reads import history, patient_key_for
from service.db.tables import ObservationRecord
from service.db.timeline import load_timeline
from service.ingest import EntryRequest
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation


def entries(*resources: dict) -> list[EntryRequest]:
    return [EntryRequest(root=f"Bundle.entry[{i}].resource", resource=orjson.loads(orjson.dumps(r)))
            for i, r in enumerate(resources)]


def test_same_result_sent_eight_times_at_once_is_stored_once(context: AppContext) -> None:
    def send(_: int) -> list[int]:
        results = context.ingestor.batch(entries(observation("same", value=121)), raw=b"{}")
        return [r.status for r in results]

    with ThreadPoolExecutor(max_workers=8) as pool:
        statuses = [s for batch in pool.map(send, range(8)) for s in batch]
    assert sorted(statuses) == [200] * 7 + [201]
    with context.db.session() as session:
        key = patient_key_for(session=session, alias="ref:Patient/p1")
        assert key is not None
        t = load_timeline(session=session, patient_key=key, end=context.clock.now() + timedelta(days=1),
                          lookback=timedelta(days=3))
        assert len(t.results) == 1
        assert len(history(session=session, resource_type="Observation", rid=t.results[0].observation_id)) == 1


def test_concurrent_versions_end_on_the_highest_ranked(context: AppContext) -> None:
    versions = [observation("v", value=110 + i, status=s)
                for i, s in enumerate(["preliminary", "final", "corrected", "preliminary", "final"])]

    def send(resource: dict) -> None:
        context.ingestor.transaction(entries(resource), raw=b"{}")

    with ThreadPoolExecutor(max_workers=5) as pool:
        list(pool.map(send, versions))
    with context.db.session() as session:
        key = patient_key_for(session=session, alias="ref:Patient/p1")
        assert key is not None
        t = load_timeline(session=session, patient_key=key, end=context.clock.now() + timedelta(days=1),
                          lookback=timedelta(days=3))
    assert [r.value for r in t.results] == [112]


def test_different_patients_proceed_and_all_land(context: AppContext) -> None:
    def send(n: int) -> int:
        batch = entries(*[observation(f"p{n}-{i}", patient=f"Patient/p{n}", value=130 + i) for i in range(20)])
        return sum(1 for r in context.ingestor.transaction(batch, raw=b"{}") if r.status == 201)

    with ThreadPoolExecutor(max_workers=8) as pool:
        created = list(pool.map(send, range(16)))
    assert created == [20] * 16


def test_concurrent_bundles_introducing_the_same_new_patients_all_succeed(context: AppContext) -> None:
    # 8 clients, 20 rounds: in each round every client sends a transaction naming six of the same
    # twelve new patients in its own order, by literal reference or by identifier (an MRN), so the
    # transactions race to link the same new aliases. Sodium 131-136 mmol/L: in range, no Flag.
    clients, rounds, per_bundle = 8, 20, 6
    start = threading.Barrier(clients, timeout=60)  # a client that fails breaks it for all, no hang

    def mrn(r: int, p: int) -> str:
        return f"MRN-{r:02d}-{p:02d}"

    def subject(r: int, p: int, c: int) -> dict[str, Any]:
        if (p + c) % 2:
            return {"identifier": {"system": "https://hospital.example.org/mrn", "value": mrn(r, p)}}
        return {"reference": f"Patient/{mrn(r, p)}"}

    def client_run(c: int) -> list[int | str]:
        rng = random.Random(c)
        statuses: list[int | str] = []
        with authorised_client(context) as api:
            for r in range(rounds):
                patients = rng.sample(range(12), per_bundle)
                obs = [observation(f"c{c}-r{r}-p{p}", value=131 + (p % 6), subject=subject(r, p, c))
                       for p in patients]
                start.wait()
                try:
                    statuses.append(api.post("/fhir", content=dumps(bundle("transaction", *obs)),
                                             headers=HEADERS).status_code)
                except Exception as exc:  # the test client re-raises what the server answered 500 for
                    statuses.append(type(exc).__name__)
        return statuses

    with ThreadPoolExecutor(max_workers=clients) as pool:
        statuses = [s for run in pool.map(client_run, range(clients)) for s in run]
    assert Counter(statuses) == {200: clients * rounds}
    with context.db.session() as session:
        stored = session.execute(select(func.count()).select_from(ObservationRecord)).scalar_one()
    assert stored == clients * rounds * per_bundle


@pytest.mark.postgres
def test_a_unit_of_work_that_loses_a_deadlock_is_run_again(postgres_url: str, tmp_path: Path,
                                                          caplog: pytest.LogCaptureFixture) -> None:
    # A deadlock on purpose: another session holds the lock of a known patient, the request (which
    # already holds its new patient's alias lock) waits for it, and then the other session asks for
    # that alias lock. PostgreSQL aborts the request, which waited first; it must be run again.
    # Sodium 131 mmol/L: in range, no Flag.
    ctx = build_context(Settings(database_url=postgres_url, data_dir=tmp_path, scheduler=False),
                        clock=FixedClock(datetime(2026, 3, 2, 12, 0, tzinfo=UTC)))
    other = create_engine(postgres_url)
    try:
        ctx.ingestor.transaction(entries(observation("k1", value=131, patient="Patient/known")), raw=b"{}")
        with ctx.db.session() as session:
            known = patient_key_for(session=session, alias="ref:Patient/known")
        with other.connect() as conn, ThreadPoolExecutor(max_workers=1) as pool:
            conn.execute(text("SELECT pg_advisory_xact_lock(hashtextextended(:k, 0))"), {"k": known})
            request = pool.submit(ctx.ingestor.transaction, entries(
                observation("k2", value=131, patient="Patient/known"),
                observation("n1", value=131, patient="Patient/new")), raw=b"{}")
            waiting = "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND NOT granted"
            for _ in range(100):
                if conn.execute(text(waiting)).scalar_one():
                    break
                time.sleep(0.05)
            with caplog.at_level(logging.WARNING, logger="lytestream.db"):
                conn.execute(text("SELECT pg_advisory_xact_lock(hashtextextended(:k, 0))"),
                             {"k": "alias:ref:Patient/new"})
                conn.commit()
                results = request.result(timeout=30)
    finally:
        other.dispose()
        ctx.db.dispose()
    assert [r.status for r in results] == [201, 201]
    assert "SQLSTATE 40P01" in caplog.text
