"""Retention: raw request bytes and AuditEvents older than the period go, in batches, and the purge
leaves an AuditEvent of its own with counts only. Results, Flags and their versions stay."""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import orjson
from fastapi.testclient import TestClient
from fhir.resources.R4B.auditevent import AuditEvent
from sqlalchemy import func, select

from service.clock import FixedClock
from service.db.tables import AuditRecord, FhirVersion, FlagRecord, ObservationRecord, ReceivedRequest
from service.jobs import run_job
from service.retention import purge_expired
from tests.factories import HEADERS, bundle, dumps, observation


def _count(ctx: Any, model: Any) -> int:
    with ctx.db.session() as session:
        return int(session.execute(select(func.count()).select_from(model)).scalar_one())


def _send(client: TestClient, clock: FixedClock, tag: str, n: int, value: float = 130) -> None:
    at = (clock.now() - timedelta(hours=1)).isoformat()
    obs = [observation(f"{tag}-{i}", value=value, patient=f"Patient/{tag}-{i}", effective=at) for i in range(n)]
    for o in obs:  # one request each: one raw request row and one ingest AuditEvent each
        assert client.post("/fhir", content=dumps(bundle("transaction", o)), headers=HEADERS).status_code == 200


def _purge_events(ctx: Any) -> list[dict[str, Any]]:
    with ctx.db.session() as session:
        rows = session.execute(select(AuditRecord.resource).where(AuditRecord.subtype == "purge"))  # type: ignore[call-overload]
        return [orjson.loads(r[0]) for r in rows]


def test_only_what_is_older_than_the_period_is_purged(context: Any, client: TestClient, clock: FixedClock) -> None:
    _send(client, clock, "old", 4)
    clock.advance(timedelta(days=31))
    _send(client, clock, "new", 3)
    requests_before, audits_before = _count(context, ReceivedRequest), _count(context, AuditRecord)

    purged = purge_expired(context.db, days=30, now=clock.now(), base_url="http://testserver/fhir")

    assert purged.received_requests == 4
    # Four ingest events went; the other events (token use and the like) are recent or not ingest.
    assert purged.audit_events >= 4
    assert _count(context, ReceivedRequest) == requests_before - 4 == 3
    assert _count(context, AuditRecord) == audits_before - purged.audit_events + 1  # + the purge's own
    with context.db.session() as session:
        kept = session.execute(select(func.min(AuditRecord.recorded))).scalar_one()  # type: ignore[arg-type]
    assert kept >= clock.now() - timedelta(days=30)


def test_results_flags_and_their_versions_outlive_the_purge(context: Any, client: TestClient,
                                                            clock: FixedClock) -> None:
    # Sodium 115 mmol/L: below the default critical low of 120 mmol/L (RCPath G158 2017), so a Flag.
    _send(client, clock, "crit", 2, value=115)
    held = {m: _count(context, m) for m in (ObservationRecord, FlagRecord, FhirVersion)}
    clock.advance(timedelta(days=400))
    purge_expired(context.db, days=30, now=clock.now(), base_url="http://testserver/fhir")
    assert _count(context, ReceivedRequest) == 0
    assert {m: _count(context, m) for m in held} == held
    assert held[FlagRecord] == 2


def test_many_rows_go_in_several_small_batches_and_are_counted_once(context: Any, client: TestClient,
                                                                    clock: FixedClock) -> None:
    _send(client, clock, "b", 7)
    clock.advance(timedelta(days=10))
    purged = purge_expired(context.db, days=1, now=clock.now(), base_url="http://testserver/fhir", batch=3)
    assert purged.received_requests == 7  # batches of 3, 3, 1
    assert _count(context, ReceivedRequest) == 0


def test_the_purge_is_audited_with_counts_and_no_patient(context: Any, client: TestClient, clock: FixedClock) -> None:
    _send(client, clock, "a", 2)
    clock.advance(timedelta(days=8))
    purged = purge_expired(context.db, days=7.5, now=clock.now(), base_url="http://testserver/fhir")
    (event,) = _purge_events(context)
    AuditEvent.model_validate(event)
    details = {d["type"]: d["valueString"] for e in event["entity"] for d in e.get("detail", [])}
    assert details == {"received-requests": str(purged.received_requests), "audit-events": str(purged.audit_events),
                       "recorded-before": (clock.now() - timedelta(days=7.5)).isoformat().replace("+00:00", "Z"),
                       "retention-days": "7.5"}
    assert event["action"] == "D"
    text = orjson.dumps(event).decode()
    assert "Patient/" not in text and "a-0" not in text


def test_a_purge_that_finds_nothing_leaves_no_event(context: Any, client: TestClient, clock: FixedClock) -> None:
    _send(client, clock, "fresh", 2)
    purged = purge_expired(context.db, days=30, now=clock.now(), base_url="http://testserver/fhir")
    assert purged.total == 0
    assert _purge_events(context) == []


def test_a_purge_right_after_a_purge_takes_only_what_has_aged_since(context: Any, client: TestClient,
                                                                     clock: FixedClock) -> None:
    _send(client, clock, "x", 2)
    clock.advance(timedelta(days=31))
    first = purge_expired(context.db, days=30, now=clock.now(), base_url="http://testserver/fhir")
    second = purge_expired(context.db, days=30, now=clock.now(), base_url="http://testserver/fhir")
    assert first.received_requests == 2 and second.total == 0
    assert len(_purge_events(context)) == 1  # the first purge's event is recent: it stays


def test_the_scheduler_job_purges_only_when_a_period_is_set(context: Any, client: TestClient,
                                                            clock: FixedClock) -> None:
    _send(client, clock, "j", 3)
    clock.advance(timedelta(days=90))
    assert context.settings.retention_days is None
    assert run_job(context, "purge-retention") == 0
    assert _count(context, ReceivedRequest) == 3
    context.settings = context.settings.model_copy(update={"retention_days": 30.0})
    assert run_job(context, "purge-retention") >= 3
    assert _count(context, ReceivedRequest) == 0
