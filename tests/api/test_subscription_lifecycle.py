"""A Subscription's read-modify-write keeps its secrets, and DELETE means what FHIR says it means.

http.html#delete: after a delete, a read answers 410 Gone and a search leaves the resource out; deleting a
resource that does not exist is a success (200 or 204). http.html#update for the read-modify-write.
Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017).
"""

from __future__ import annotations

from typing import Any

import orjson
from fastapi.testclient import TestClient

from service.api.context import AppContext
from tests.api.test_subscriptions import hook, raise_flag, subscribe  # noqa: F401  (hook is a fixture)
from tests.factories import HEADERS


def put(client: TestClient, sid: str, body: dict[str, Any]) -> Any:
    return client.put(f"/fhir/Subscription/{sid}", content=orjson.dumps(body), headers=HEADERS)


def test_a_put_of_the_read_body_keeps_the_stored_header_value(client: TestClient, context: AppContext,
                                                              hook: Any) -> None:  # noqa: F811
    hook.respond(200)
    sub = subscribe(client)
    read = client.get(f"/fhir/Subscription/{sub['id']}").json()
    assert read["channel"]["header"] == ["Authorization: (withheld)"]
    read["reason"] = "rapid-response paging, night team"
    assert put(client, sub["id"], read).status_code == 200
    context.dispatcher.run_once()  # the handshake goes out with the header as first stored
    assert hook.calls[-1].request.headers["authorization"] == "Bearer pager-secret"


def test_a_put_with_a_new_header_value_replaces_it(client: TestClient, context: AppContext,
                                                   hook: Any) -> None:  # noqa: F811
    hook.respond(200)
    sub = subscribe(client)
    read = client.get(f"/fhir/Subscription/{sub['id']}").json()
    read["channel"]["header"] = ["Authorization: Bearer rotated"]
    assert put(client, sub["id"], read).status_code == 200
    context.dispatcher.run_once()
    assert hook.calls[-1].request.headers["authorization"] == "Bearer rotated"


def test_a_masked_value_for_a_header_never_stored_is_refused(client: TestClient) -> None:
    sub = subscribe(client)
    read = client.get(f"/fhir/Subscription/{sub['id']}").json()
    read["channel"]["header"] = ["Authorization: (withheld)", "X-Pager-Key: (withheld)"]
    r = put(client, sub["id"], read)
    assert r.status_code == 422
    assert "X-Pager-Key" in r.text and "Subscription.channel.header[1]" in r.text


def test_a_deleted_subscription_reads_as_gone(client: TestClient) -> None:
    sub = subscribe(client)
    assert client.delete(f"/fhir/Subscription/{sub['id']}").status_code == 204
    r = client.get(f"/fhir/Subscription/{sub['id']}")
    assert r.status_code == 410
    assert r.json()["resourceType"] == "OperationOutcome"


def test_a_search_leaves_a_deleted_subscription_out(client: TestClient) -> None:
    kept, gone = subscribe(client), subscribe(client)
    client.delete(f"/fhir/Subscription/{gone['id']}")
    listed = client.get("/fhir/Subscription").json()
    assert [e["resource"]["id"] for e in listed["entry"]] == [kept["id"]]
    assert listed["total"] == 1


def test_deleting_an_unknown_subscription_succeeds(client: TestClient) -> None:
    assert client.delete("/fhir/Subscription/never-held").status_code == 204


def test_deleting_twice_succeeds(client: TestClient) -> None:
    sub = subscribe(client)
    client.delete(f"/fhir/Subscription/{sub['id']}")
    assert client.delete(f"/fhir/Subscription/{sub['id']}").status_code == 204


def test_a_deleted_subscription_cannot_be_updated_or_asked_its_status(client: TestClient) -> None:
    sub = subscribe(client)
    client.delete(f"/fhir/Subscription/{sub['id']}")
    body = {k: v for k, v in sub.items() if k not in ("id", "meta")}
    assert put(client, sub["id"], body).status_code == 410
    assert client.get(f"/fhir/Subscription/{sub['id']}/$status").status_code == 410
    assert client.get(f"/fhir/Subscription/{sub['id']}/$events").status_code == 410


def test_a_deleted_subscription_is_sent_nothing_more(client: TestClient, context: AppContext,
                                                     hook: Any) -> None:  # noqa: F811
    hook.respond(200)
    sub = subscribe(client)
    context.dispatcher.run_once()
    client.delete(f"/fhir/Subscription/{sub['id']}")
    raise_flag(client)
    context.dispatcher.run_once()
    assert len(hook.calls) == 1  # the handshake only
