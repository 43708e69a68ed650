"""The dispatcher: whoever records a send still holds the subscription's lease, and a high-priority
Flag's notification never waits out a long backoff.

Outbound HTTP is mocked with respx; the two-process drills are in tests/test_replicas_postgres.py.
"""

# Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low (high
# priority). Sodium 150 then 138 six hours later is a fall of 12 mmol/L from a peak above 145,
# past the 10 mmol/L in 24 h limit (Adrogue & Madias, NEJM 2000, from memory), so it raises
# sodium-fall-too-fast (medium priority) without a critical level.

from __future__ import annotations

import random
from collections.abc import Iterator
from datetime import datetime, timedelta

import httpx
import pytest
import respx
from fastapi.testclient import TestClient
from sqlalchemy import select

from service.api.context import AppContext
from service.clock import FixedClock
from service.db.tables import DeliveryAttempt, SubscriptionEvent
from service.dispatch import Dispatcher
from tests.api.test_subscriptions import HOOK, raise_flag, subscribe
from tests.factories import HEADERS, bundle, dumps, observation

_A = DeliveryAttempt.__table__  # type: ignore[attr-defined]
_E = SubscriptionEvent.__table__  # type: ignore[attr-defined]


@pytest.fixture
def hook() -> Iterator[respx.Route]:
    with respx.mock(assert_all_called=False) as mock:
        yield mock.post(HOOK)


def replica(context: AppContext, clock: FixedClock) -> Dispatcher:
    """A second dispatcher on the same store, as another replica runs one."""
    return Dispatcher(db=context.db, settings=context.settings, clock=clock, client=httpx.Client(),
                      rng=random.Random(1))


def test_a_send_that_outlasts_its_lease_is_left_to_the_replica_that_took_over(
    client: TestClient, context: AppContext, clock: FixedClock, hook: respx.Route
) -> None:
    hook.respond(200)
    subscribe(client)
    context.dispatcher.run_once()  # handshake
    raise_flag(client)
    other = replica(context, clock)
    taken_over: list[int] = []
    sends = 0

    def answer_after_the_lease(request: httpx.Request) -> httpx.Response:
        nonlocal sends
        sends += 1
        if sends == 1:
            # The first replica's send hangs past its lease; the other replica takes over meanwhile.
            clock.advance(timedelta(minutes=5))  # past any lease
            taken_over.append(other.run_once())
        return httpx.Response(200)

    hook.side_effect = answer_after_the_lease
    assert context.dispatcher.run_once() == 0  # its answer came too late to be recorded by it
    assert taken_over == [1]
    with context.db.session() as session:
        events = session.execute(select(_E.c.id, _E.c.status, _E.c.attempts)
                                 .where(_E.c.kind == "event-notification")).all()
        attempts = session.execute(select(_A.c.event_id).where(_A.c.event_id == events[0].id)).all()
    assert [(e.status, e.attempts) for e in events] == [("sent", 1)]
    assert len(attempts) == 1  # recorded once, by the replica that held the lease


def test_a_replica_does_not_send_for_a_subscription_another_holds(
    client: TestClient, context: AppContext, clock: FixedClock, hook: respx.Route
) -> None:
    hook.respond(200)
    subscribe(client)
    context.dispatcher.run_once()
    raise_flag(client)
    other = replica(context, clock)
    during: list[int] = []

    def answer(request: httpx.Request) -> httpx.Response:
        during.append(other.run_once())  # the lease is live: the other replica finds nothing to claim
        return httpx.Response(200)

    hook.side_effect = answer
    assert context.dispatcher.run_once() == 1
    assert during == [0]
    assert len(hook.calls) == 2  # handshake and the one event, each sent once


class _Longest(random.Random):
    """Full jitter at the top of its window: the longest wait the schedule allows."""

    def uniform(self, a: float, b: float) -> float:
        return b


def head_row(context: AppContext) -> tuple[int, datetime]:
    """(attempts, next attempt) of the first unsent event."""
    with context.db.session() as session:
        row = session.execute(select(_E.c.attempts, _E.c.next_attempt_at)
                              .where(_E.c.kind == "event-notification", _E.c.status == "pending")
                              .order_by(_E.c.id)).first()
    assert row is not None
    return row.attempts, row.next_attempt_at


def test_through_a_long_outage_a_high_priority_event_is_retried_within_the_urgent_cap(
    client: TestClient, context: AppContext, clock: FixedClock, hook: respx.Route
) -> None:
    hook.respond(200)
    subscribe(client)
    context.dispatcher.run_once()
    hook.side_effect = httpx.ConnectError("refused")
    context.dispatcher.rng = _Longest()
    raise_flag(client)  # high priority
    waits = []
    for _ in range(10):
        context.dispatcher.run_once()
        attempts, at = head_row(context)
        waits.append((at - clock.now()).total_seconds())
        clock.set(at)
    assert attempts == 10
    assert max(waits) == context.settings.delivery_urgent_cap_seconds  # 2, 4, 8, then 10 s each


def test_a_high_priority_event_behind_a_long_retry_brings_the_retry_forward(
    client: TestClient, context: AppContext, clock: FixedClock, hook: respx.Route
) -> None:
    hook.respond(200)
    subscribe(client)
    context.dispatcher.run_once()
    hook.side_effect = httpx.ConnectError("refused")
    context.dispatcher.rng = _Longest()
    falling = [observation("fall-1", value=150, patient="Patient/p1", effective="2026-03-02T02:00:00+00:00"),
               observation("fall-2", value=138, patient="Patient/p1", effective="2026-03-02T08:00:00+00:00")]
    assert client.post("/fhir", content=dumps(bundle("batch", *falling)), headers=HEADERS).status_code == 200
    for _ in range(7):  # medium priority: waits of 2, 4, ... 128 s
        context.dispatcher.run_once()
        clock.set(head_row(context)[1])
    context.dispatcher.run_once()
    attempts, at = head_row(context)
    assert (attempts, at - clock.now()) == (8, timedelta(seconds=256))
    raise_flag(client, ident="b", patient="Patient/p2")  # high priority, queued behind it
    tries = len(hook.calls)
    context.dispatcher.run_once()  # the next pass sees it
    clock.advance(timedelta(seconds=context.settings.delivery_urgent_cap_seconds))
    context.dispatcher.run_once()
    assert len(hook.calls) == tries + 1  # retried within the urgent cap, not 256 s after the last try


def test_a_subscription_waiting_on_a_retry_does_not_hold_up_another(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    other_hook = "https://pager-2.example.org/hook"
    with respx.mock(assert_all_called=False) as mock:
        routes = {HOOK: mock.post(HOOK).respond(200), other_hook: mock.post(other_hook).respond(200)}
        subs = [subscribe(client), subscribe(client, endpoint=other_hook)]
        context.dispatcher.run_once()  # both handshakes
        # The one claimed first (the lower id) fails and waits; the other must still be served.
        first, second = sorted(subs, key=lambda s: s["id"])
        failing = routes[first["channel"]["endpoint"]]
        working = routes[second["channel"]["endpoint"]]
        failing.side_effect = httpx.ConnectError("refused")
        raise_flag(client)
        before = len(working.calls)
        context.dispatcher.run_once()
        assert len(failing.calls) == 2 and len(working.calls) == before + 1
