"""Subscriptions through the API: handshake, numbered events, retries, error and re-activation, $status, $events.

Outbound HTTP is mocked with respx here; tests/test_delivery_loopback.py uses a real receiver.
"""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from datetime import timedelta
from typing import Any

import httpx
import orjson
import pytest
import respx
from fastapi.testclient import TestClient
from fhir.resources.R4B import get_fhir_model_class

from service.api.context import AppContext
from service.clock import FixedClock
from service.domain.findings import Priority
from service.notify.topics import FLAG_CHANGED, FLAG_ESCALATED
from tests.factories import HEADERS, bundle, dumps, observation

HOOK = "https://pager.example.org/hook"
SD = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"


def subscription(topic: str = FLAG_CHANGED, filters: str | None = None, content: str = "id-only",
                 payload: str = "application/fhir+json", endpoint: str = HOOK) -> dict[str, Any]:
    sub: dict[str, Any] = {
        "resourceType": "Subscription", "status": "requested", "reason": "rapid-response paging",
        "criteria": topic,
        "channel": {"type": "rest-hook", "endpoint": endpoint, "payload": payload,
                    "header": ["Authorization: Bearer pager-secret"],
                    "_payload": {"extension": [{"url": f"{SD}/backport-payload-content", "valueCode": content}]}},
    }
    if filters:
        sub["_criteria"] = {"extension": [{"url": f"{SD}/backport-filter-criteria", "valueString": filters}]}
    return sub


def subscribe(client: TestClient, **kw: Any) -> dict[str, Any]:
    r = client.post("/fhir/Subscription", content=orjson.dumps(subscription(**kw)), headers=HEADERS)
    assert r.status_code == 201, r.text
    return dict(r.json())


def raise_flag(client: TestClient, ident: str = "a", value: float = 118, patient: str = "Patient/p1") -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", observation(ident, value=value, patient=patient))),
                    headers=HEADERS)
    assert r.status_code == 200


def received(route: respx.Route) -> list[dict[str, Any]]:
    return [orjson.loads(call.request.content) for call in route.calls]


def params_of(notification: dict[str, Any]) -> dict[str, Any]:
    return {p["name"]: p for p in notification["entry"][0]["resource"]["parameter"]}


def exhaust_attempts(context: AppContext, clock: FixedClock) -> None:
    """Run the dispatcher past every allowed attempt, waiting out each backoff.

    The flags raised here are high priority, so the urgent schedule's count of attempts applies.
    """
    for _ in range(context.dispatcher.policy.attempts(urgent=True) + 1):
        context.dispatcher.run_once()
        clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))


@pytest.fixture
def hook() -> Any:
    with respx.mock(assert_all_called=False) as mock:
        yield mock.post(HOOK)


def test_create_sends_a_handshake_and_activates_on_2xx(client: TestClient, context: AppContext, hook: Any) -> None:
    hook.respond(200)
    sub = subscribe(client)
    assert sub["status"] == "requested"
    assert context.dispatcher.run_once() == 1
    (note,) = received(hook)
    assert params_of(note)["type"]["valueCode"] == "handshake"
    assert hook.calls[0].request.headers["authorization"] == "Bearer pager-secret"
    assert hook.calls[0].request.headers["content-type"] == "application/fhir+json"
    assert client.get(f"/fhir/Subscription/{sub['id']}").json()["status"] == "active"


def test_each_flag_change_is_one_numbered_event(client: TestClient, context: AppContext, hook: Any) -> None:
    hook.respond(200)
    subscribe(client)
    context.dispatcher.run_once()
    raise_flag(client)  # raises sodium-critical-low
    raise_flag(client, value=138)  # the same result re-issued at 138: the flag closes (change 2)
    context.dispatcher.run_once()
    events = [params_of(n) for n in received(hook)[1:]]
    numbers = [next(p["valueString"] for p in e["notification-event"]["part"] if p["name"] == "event-number")
               for e in events]
    assert numbers == ["1", "2"]
    for n in received(hook):
        get_fhir_model_class("Bundle").model_validate(n)


def test_filters_keep_other_patients_out(client: TestClient, context: AppContext, hook: Any) -> None:
    hook.respond(200)
    subscribe(client, filters="Flag?patient=Patient/p2")
    context.dispatcher.run_once()
    raise_flag(client, patient="Patient/p1")
    raise_flag(client, ident="b", patient="Patient/p2")
    context.dispatcher.run_once()
    assert len(received(hook)) == 2  # the handshake and p2's flag


def test_server_error_is_retried_with_backoff_and_order_kept(
    client: TestClient, context: AppContext, clock: FixedClock, hook: Any
) -> None:
    hook.respond(200)
    subscribe(client)
    context.dispatcher.run_once()
    hook.side_effect = [httpx.Response(503), httpx.Response(200), httpx.Response(200)]
    raise_flag(client)
    raise_flag(client, ident="b", patient="Patient/p2")
    context.dispatcher.run_once()
    assert len(hook.calls) == 2  # handshake, then event 1 failed; event 2 waits behind it
    clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
    context.dispatcher.run_once()
    numbers = [next(p["valueString"] for p in params_of(n)["notification-event"]["part"]
                    if p["name"] == "event-number") for n in received(hook)[1:]]
    assert numbers == ["1", "1", "2"]


def test_after_the_last_attempt_the_subscription_is_in_error_and_keeps_counting(
    client: TestClient, context: AppContext, clock: FixedClock, hook: Any
) -> None:
    hook.respond(200)
    sub = subscribe(client)
    context.dispatcher.run_once()
    hook.side_effect = None
    hook.mock(side_effect=httpx.ConnectError("refused"))
    raise_flag(client)
    exhaust_attempts(context, clock)
    served = client.get(f"/fhir/Subscription/{sub['id']}").json()
    assert served["status"] == "error" and "connect" in served["error"]
    raise_flag(client, ident="b", patient="Patient/p2")  # still counted while in error
    status = client.get(f"/fhir/Subscription/{sub['id']}/$status").json()
    params = {p["name"]: p for p in status["entry"][0]["resource"]["parameter"]}
    assert params["events-since-subscription-start"]["valueString"] == "2"
    assert params["status"]["valueCode"] == "error"


def test_reactivation_resends_a_handshake_then_the_missed_events(
    client: TestClient, context: AppContext, clock: FixedClock, hook: Any
) -> None:
    hook.respond(200)
    sub = subscribe(client)
    context.dispatcher.run_once()
    hook.mock(side_effect=httpx.ConnectError("refused"))
    raise_flag(client)
    exhaust_attempts(context, clock)
    hook.mock(side_effect=None, return_value=httpx.Response(200))
    body = {**subscription(), "status": "requested"}
    assert client.put(f"/fhir/Subscription/{sub['id']}", content=orjson.dumps(body), headers=HEADERS).status_code == 200
    calls_before = len(hook.calls)
    context.dispatcher.run_once()
    kinds = [params_of(n)["type"]["valueCode"] for n in received(hook)[calls_before:]]
    assert kinds == ["handshake", "event-notification"]
    assert client.get(f"/fhir/Subscription/{sub['id']}").json()["status"] == "active"


def test_events_operation_returns_events_by_number(client: TestClient, context: AppContext, hook: Any) -> None:
    hook.respond(200)
    sub = subscribe(client)
    raise_flag(client)
    raise_flag(client, ident="b", patient="Patient/p2")
    r = client.get(f"/fhir/Subscription/{sub['id']}/$events?eventsSinceNumber=2&content=full-resource")
    assert r.status_code == 200
    got = r.json()
    get_fhir_model_class("Bundle").model_validate(got)
    assert any(e.get("resource", {}).get("resourceType") == "Flag" for e in got["entry"][1:])
    events = params_of(got)["notification-event"]
    assert next(p["valueString"] for p in events["part"] if p["name"] == "event-number") == "2"


def test_plain_http_endpoint_is_refused_by_default(client: TestClient) -> None:
    r = client.post("/fhir/Subscription", content=orjson.dumps(subscription(endpoint="http://pager.example.org/h")),
                    headers=HEADERS)
    assert r.status_code == 422
    assert r.json()["issue"][0]["expression"] == ["Subscription.channel.endpoint"]


def test_r4b_form_when_the_payload_asks_for_fhir_version_4_3(
    client: TestClient, context: AppContext, hook: Any
) -> None:
    hook.respond(200)
    subscribe(client, payload="application/fhir+json; fhirVersion=4.3")
    context.dispatcher.run_once()
    (note,) = received(hook)
    assert note["entry"][0]["resource"]["resourceType"] == "SubscriptionStatus"
    assert hook.calls[0].request.headers["content-type"] == "application/fhir+json; fhirVersion=4.3"


def test_unacknowledged_high_flag_is_escalated_once_per_interval(
    client: TestClient, context: AppContext, clock: FixedClock, hook: Any
) -> None:
    hook.respond(200)
    subscribe(client, topic=FLAG_ESCALATED)
    context.dispatcher.run_once()
    raise_flag(client)
    interval = timedelta(minutes=context.policy.escalation.after_minutes[Priority.HIGH])
    assert context.evaluator.escalate(context.db, clock.now()) == 0
    clock.advance(interval + timedelta(seconds=1))
    assert context.evaluator.escalate(context.db, clock.now()) == 1
    assert context.evaluator.escalate(context.db, clock.now()) == 0  # the same round never fires twice
    flag_id = client.get("/fhir/Flag").json()["entry"][0]["resource"]["id"]
    client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=b"", headers=HEADERS)
    clock.advance(interval)
    assert context.evaluator.escalate(context.db, clock.now()) == 0


def test_delete_answers_204_and_the_subscription_is_gone(client: TestClient, hook: Any) -> None:
    # http.html#delete; more in tests/api/test_subscription_lifecycle.py.
    sub = subscribe(client)
    assert client.delete(f"/fhir/Subscription/{sub['id']}").status_code == 204
    assert client.get(f"/fhir/Subscription/{sub['id']}").status_code == 410


def test_idle_subscription_gets_heartbeats_that_do_not_count_as_events(
    client: TestClient, context: AppContext, clock: FixedClock, hook: Any
) -> None:
    from service.jobs import run_job

    hook.respond(200)
    sub = subscription()
    sub["channel"]["extension"] = [{"url": f"{SD}/backport-heartbeat-period", "valueUnsignedInt": 60}]
    created = client.post("/fhir/Subscription", content=orjson.dumps(sub), headers=HEADERS).json()
    context.dispatcher.run_once()
    assert run_job(context, "queue-heartbeats") == 0  # just sent the handshake
    clock.advance(timedelta(seconds=61))
    assert run_job(context, "queue-heartbeats") == 1
    assert run_job(context, "queue-heartbeats") == 0  # one is already queued
    context.dispatcher.run_once()
    beat = params_of(received(hook)[-1])
    assert beat["type"]["valueCode"] == "heartbeat"
    assert beat["events-since-subscription-start"]["valueString"] == "0"
    assert client.get(f"/fhir/Subscription/{created['id']}").json()["status"] == "active"


def test_channel_header_values_are_never_served_back(client: TestClient, hook: Any) -> None:
    created = subscribe(client)
    assert created["channel"]["header"] == ["Authorization: (withheld)"]
    listed = client.get("/fhir/Subscription").json()["entry"][0]["resource"]
    assert "pager-secret" not in orjson.dumps(listed).decode()
