"""The dispatcher's lease: whoever records a send still holds the subscription.

Outbound HTTP is mocked with respx; the two-process drills are in tests/test_replicas_postgres.py.
"""

# Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost 1990: clinical-reference §1), so it raises sodium-critical-low.

from __future__ import annotations

import random
from collections.abc import Iterator
from datetime import timedelta

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
