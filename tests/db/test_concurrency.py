"""Concurrent requests for one patient end as serial ones would; nothing is lost or doubled."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from datetime import timedelta

import orjson

from service.api.context import AppContext
from service.db.reads import history, patient_key_for
from service.db.timeline import load_timeline
from service.ingest import EntryRequest
from tests.factories import observation


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
