"""Escalation: an unacknowledged Flag is announced on flag-escalated once per policy interval for its
priority (default high 15 min, medium 60 min: common practice, no source), and an acknowledgement
covers the priority it saw: a later rise in priority re-opens escalation.

Clinical values, with their sources:
- Sodium at or below 120 mmol/L is critical low, high priority (RCPath G158 2017).
- Potassium below 3.5 mmol/L during IV insulin raises hypokalemia-on-insulin at once at medium
  priority (Umpierrez 2024, from memory); below 3.0 makes it high (common practice, no source).
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.clock import FixedClock
from service.db.acks import claim_escalation, due_escalations
from service.domain.findings import Priority
from service.notify.topics import FLAG_ESCALATED
from tests.api.test_paging import events, potassium, send, sodium, subscribe
from tests.factories import HEADERS, insulin

SECOND = timedelta(seconds=1)


@pytest.fixture(autouse=True)
def escalated(client: TestClient) -> str:
    """A subscriber on flag-escalated: escalate() counts the events it queues."""
    return subscribe(client, FLAG_ESCALATED)


def after(context: AppContext, priority: Priority) -> timedelta:
    return timedelta(minutes=context.policy.escalation.after_minutes[priority])


def escalate(context: AppContext, clock: FixedClock) -> int:
    return context.evaluator.escalate(context.db, clock.now())


def ack(client: TestClient, flag_id: str) -> None:
    assert client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=b"", headers=HEADERS).status_code == 200


def only_flag(client: TestClient) -> dict[str, Any]:
    (entry,) = client.get("/fhir/Flag").json()["entry"]
    return dict(entry["resource"])


def raise_medium_hypokalaemia(client: TestClient) -> str:
    """K 3.4 at 11:30 during an IV insulin infusion: a medium Flag at 12:00 (not yet 2 h without a recheck)."""
    send(client, insulin("m1", start="2026-03-02T10:00:00+00:00"), potassium("k1", 3.4, "11:30"))
    flag = only_flag(client)
    assert flag["extension"][0]["valueCodeableConcept"]["coding"][0]["code"] == "PM"
    return str(flag["id"])


def test_a_medium_flag_is_escalated_after_the_medium_interval(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    raise_medium_hypokalaemia(client)
    clock.advance(after(context, Priority.MEDIUM) - SECOND)
    assert escalate(context, clock) == 0  # past the high interval, not yet the medium one
    clock.advance(2 * SECOND)
    assert escalate(context, clock) == 1


def test_an_acknowledged_medium_flag_that_rises_to_high_is_escalated_again_after_the_high_interval(
    client: TestClient, context: AppContext, clock: FixedClock, escalated: str
) -> None:
    flag_id = raise_medium_hypokalaemia(client)
    clock.advance(timedelta(minutes=5))
    ack(client, flag_id)
    clock.advance(timedelta(minutes=25))
    send(client, potassium("k3", 2.9, "12:30"))  # below 3.0: high
    assert only_flag(client)["extension"][0]["valueCodeableConcept"]["coding"][0]["code"] == "PH"
    clock.advance(after(context, Priority.HIGH) - SECOND)
    assert escalate(context, clock) == 0
    clock.advance(2 * SECOND)
    assert escalate(context, clock) == 1
    # Versions: 1 raised, 2 the acknowledgement, 3 the rise to high, 4 the escalation.
    assert events(context, escalated) == [(flag_id, 4)]


def test_an_acknowledgement_after_the_rise_covers_the_high_priority(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    flag_id = raise_medium_hypokalaemia(client)
    clock.advance(timedelta(minutes=30))
    send(client, potassium("k3", 2.9, "12:30"))
    ack(client, flag_id)
    clock.advance(after(context, Priority.HIGH) + SECOND)
    assert escalate(context, clock) == 0


def test_an_acknowledged_flag_at_the_same_priority_is_not_escalated(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    send(client, sodium("na8", 118, 8))
    ack(client, only_flag(client)["id"])
    send(client, sodium("na9", 117, 9))  # new evidence, still high
    clock.advance(3 * after(context, Priority.HIGH))
    assert escalate(context, clock) == 0


def test_an_unacknowledged_flag_is_escalated_once_per_interval(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    send(client, sodium("na8", 118, 8))
    clock.advance(after(context, Priority.HIGH) + SECOND)
    assert escalate(context, clock) == 1
    assert escalate(context, clock) == 0  # the same round never fires twice
    clock.advance(after(context, Priority.HIGH))
    assert escalate(context, clock) == 1


def test_after_downtime_only_one_round_is_sent(client: TestClient, context: AppContext, clock: FixedClock) -> None:
    send(client, sodium("na8", 118, 8))
    clock.advance(5 * after(context, Priority.HIGH) + SECOND)  # five rounds fell due while nobody ran
    assert escalate(context, clock) == 1
    assert escalate(context, clock) == 0
    clock.advance(after(context, Priority.HIGH))
    assert escalate(context, clock) == 1


def test_a_round_is_claimed_once_when_two_replicas_find_it_due(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    send(client, sodium("na8", 118, 8))
    clock.advance(after(context, Priority.HIGH) + SECOND)
    intervals = {p.value: timedelta(minutes=m) for p, m in context.policy.escalation.after_minutes.items()}
    with context.db.session() as session:
        (seen_by_a,) = due_escalations(session=session, after=intervals, now=clock.now())
        (seen_by_b,) = due_escalations(session=session, after=intervals, now=clock.now())
    with context.db.session(write=True) as session:
        assert claim_escalation(session=session, due=seen_by_a, after=intervals, now=clock.now())
    with context.db.session(write=True) as session:
        assert not claim_escalation(session=session, due=seen_by_b, after=intervals, now=clock.now())


def test_a_round_found_due_is_not_claimed_once_the_flag_is_acknowledged(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    send(client, sodium("na8", 118, 8))
    clock.advance(after(context, Priority.HIGH) + SECOND)
    intervals = {p.value: timedelta(minutes=m) for p, m in context.policy.escalation.after_minutes.items()}
    with context.db.session() as session:
        (due,) = due_escalations(session=session, after=intervals, now=clock.now())
    ack(client, due.flag_id)  # between one replica's look and its claim
    with context.db.session(write=True) as session:
        assert not claim_escalation(session=session, due=due, after=intervals, now=clock.now())


def test_each_escalation_is_a_flag_version_saying_its_round_and_how_long_it_was_unacknowledged(
    client: TestClient, context: AppContext, clock: FixedClock, escalated: str
) -> None:
    send(client, sodium("na8", 118, 8))
    flag_id = only_flag(client)["id"]
    for _ in range(3):
        clock.advance(after(context, Priority.HIGH))
        assert escalate(context, clock) == 1
    flag = only_flag(client)
    assert flag["meta"]["versionId"] == "4"
    assert flag["code"]["text"].startswith("Escalation 3: unacknowledged for 45 min. ")
    assert "118" in flag["code"]["text"]  # the finding is still said after the escalation
    assert events(context, escalated) == [(flag_id, 2), (flag_id, 3), (flag_id, 4)]


def test_an_escalation_version_is_not_a_difference_the_next_evaluation_undoes(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    send(client, sodium("na8", 118, 8))
    clock.advance(after(context, Priority.HIGH))
    escalate(context, clock)
    assert context.evaluator.recheck(context.db, clock.now()) == 0
    assert only_flag(client)["meta"]["versionId"] == "2"


def test_a_rise_in_priority_takes_the_older_acknowledgement_off_the_flag(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    flag_id = raise_medium_hypokalaemia(client)
    ack(client, flag_id)
    assert any(e["url"].endswith("/flag-acknowledgement") for e in only_flag(client)["extension"])
    clock.advance(timedelta(minutes=30))
    send(client, potassium("k3", 2.9, "12:30"))  # below 3.0: high
    assert not any(e["url"].endswith("/flag-acknowledgement") for e in only_flag(client)["extension"])
