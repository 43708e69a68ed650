"""While a subscription is still requested or active, $status names the failing delivery: its kind,
the attempts so far and the last error; the log says the same on every attempt."""

from __future__ import annotations

import logging
from datetime import timedelta
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.clock import FixedClock
from tests.api.test_subscriptions import hook, subscribe  # noqa: F401  (hook is a fixture)


def status_errors(client: TestClient, sid: str) -> tuple[str, list[str]]:
    body = client.get(f"/fhir/Subscription/{sid}/$status").json()
    params = {p["name"]: p for p in body["entry"][0]["resource"]["parameter"]}
    errors = [p["valueCodeableConcept"]["text"] for p in body["entry"][0]["resource"]["parameter"]
              if p["name"] == "error"]
    return params["status"]["valueCode"], errors


def test_a_dead_endpoint_shows_in_status_while_still_requested(client: TestClient, context: AppContext,
                                                                clock: FixedClock, hook: Any) -> None:  # noqa: F811
    hook.respond(503)
    sub = subscribe(client)
    assert status_errors(client, sub["id"]) == ("requested", [])
    for _ in range(2):
        context.dispatcher.run_once()
        clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
    state, errors = status_errors(client, sub["id"])
    assert state == "requested"
    assert len(errors) == 1
    assert "handshake" in errors[0] and "2 attempt(s)" in errors[0] and "http-5xx" in errors[0]


def test_the_trouble_clears_once_a_delivery_succeeds(client: TestClient, context: AppContext, clock: FixedClock,
                                                     hook: Any) -> None:  # noqa: F811
    hook.respond(503)
    sub = subscribe(client)
    context.dispatcher.run_once()
    hook.respond(200)
    clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
    context.dispatcher.run_once()
    assert status_errors(client, sub["id"]) == ("active", [])


def test_each_attempt_and_the_state_change_are_logged(client: TestClient, context: AppContext, clock: FixedClock,
                                                      hook: Any, caplog: pytest.LogCaptureFixture) -> None:  # noqa: F811
    hook.respond(503)
    sub = subscribe(client)
    with caplog.at_level(logging.INFO, logger="lytestream.dispatch"):
        context.dispatcher.run_once()
        hook.respond(200)
        clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
        context.dispatcher.run_once()
    attempts = [r for r in caplog.records if r.getMessage() == "delivery attempt"]
    assert [(r.outcome, r.attempt, r.error) for r in attempts] == [("retry", 1, "http-5xx"), ("ok", 2, None)]  # type: ignore[attr-defined]
    assert all(r.subscription == sub["id"] for r in attempts)  # type: ignore[attr-defined]
    changes = [(r.__dict__["from"], r.__dict__["to"]) for r in caplog.records if r.getMessage() == "subscription state"]
    assert changes == [("requested", "active")]


def test_a_client_turning_its_subscription_off_is_logged(client: TestClient, hook: Any,  # noqa: F811
                                                         caplog: pytest.LogCaptureFixture) -> None:
    import orjson

    from tests.factories import HEADERS

    hook.respond(200)
    sub = subscribe(client)
    body = client.get(f"/fhir/Subscription/{sub['id']}").json()
    with caplog.at_level(logging.INFO, logger="lytestream.subscriptions"):
        r = client.put(f"/fhir/Subscription/{sub['id']}", content=orjson.dumps({**body, "status": "off"}),
                       headers=HEADERS)
    assert r.status_code == 200, r.text
    changes = [(r.__dict__["from"], r.__dict__["to"], r.__dict__["by"]) for r in caplog.records
               if r.getMessage() == "subscription state"]
    assert changes == [("requested", "off", "test-suite")]
