"""Who may subscribe to what: a payload that carries Flags needs the Flag read scope, and a subscription
belongs to the client that made it (others need the lytestream/admin scope).

Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017).
"""

from __future__ import annotations

from typing import Any

import orjson
import pytest
import respx
from fastapi.testclient import TestClient
from sqlalchemy import update

from service.api.context import AppContext
from service.db.tables import SubscriptionRecord
from tests.api.test_subscriptions import HOOK, raise_flag, subscription
from tests.conftest import authorised_client
from tests.factories import HEADERS

SUBSCRIBER = "system/Subscription.cruds"
FULL_SUBSCRIBER = "system/Subscription.cruds system/Flag.r"
ADMIN = "system/Subscription.cruds system/Flag.r lytestream/admin"


@pytest.fixture
def hook() -> Any:
    with respx.mock(assert_all_called=False) as mock:
        yield mock.post(HOOK).respond(200)


def post_subscription(client: TestClient, **kw: Any) -> Any:
    return client.post("/fhir/Subscription", content=orjson.dumps(subscription(**kw)), headers=HEADERS)


def make(context: AppContext, scope: str, client: str, **kw: Any) -> dict[str, Any]:
    with authorised_client(context, scope=scope, client=client) as c:
        r = post_subscription(c, **kw)
    assert r.status_code == 201, r.text
    return dict(r.json())


def test_subscription_scope_alone_cannot_create_a_full_resource_subscription(context: AppContext) -> None:
    with authorised_client(context, scope=SUBSCRIBER, client="pager") as pager:
        r = post_subscription(pager, content="full-resource")
    assert r.status_code == 403
    assert "system/Flag.r" in r.json()["issue"][0]["diagnostics"]
    assert 'scope="system/Flag.r"' in r.headers["www-authenticate"]


def test_subscription_scope_alone_may_create_an_id_only_subscription(context: AppContext) -> None:
    make(context, SUBSCRIBER, "pager", content="id-only")


def test_subscription_and_flag_read_scopes_may_create_a_full_resource_subscription(context: AppContext) -> None:
    assert make(context, FULL_SUBSCRIBER, "pager", content="full-resource")["status"] == "requested"


def test_changing_a_subscription_to_full_resource_needs_the_flag_read_scope(context: AppContext) -> None:
    sub = make(context, SUBSCRIBER, "pager", content="id-only")
    with authorised_client(context, scope=SUBSCRIBER, client="pager") as pager:
        r = pager.put(f"/fhir/Subscription/{sub['id']}", content=orjson.dumps(subscription(content="full-resource")),
                      headers=HEADERS)
    assert r.status_code == 403
    assert "system/Flag.r" in r.json()["issue"][0]["diagnostics"]


def test_events_of_a_full_resource_subscription_need_the_flag_read_scope(
        client: TestClient, context: AppContext, hook: Any) -> None:
    sub = make(context, FULL_SUBSCRIBER, "pager", content="full-resource")
    raise_flag(client)
    with authorised_client(context, scope="system/Subscription.r", client="pager") as reader:
        r = reader.get(f"/fhir/Subscription/{sub['id']}/$events")
    assert r.status_code == 403
    assert "system/Flag.r" in r.json()["issue"][0]["diagnostics"]
    assert "Flag" not in {e.get("resource", {}).get("resourceType") for e in r.json().get("entry", [])}


def test_asking_events_of_an_id_only_subscription_as_full_resource_needs_the_flag_read_scope(
        client: TestClient, context: AppContext, hook: Any) -> None:
    sub = make(context, SUBSCRIBER, "pager", content="id-only")
    raise_flag(client)
    with authorised_client(context, scope=SUBSCRIBER, client="pager") as pager:
        assert pager.get(f"/fhir/Subscription/{sub['id']}/$events?content=full-resource").status_code == 403
        plain = pager.get(f"/fhir/Subscription/{sub['id']}/$events")
    assert plain.status_code == 200
    kinds = {e.get("resource", {}).get("resourceType") for e in plain.json()["entry"]}
    assert "Flag" not in kinds


@pytest.mark.parametrize(("method", "suffix"), [("GET", ""), ("PUT", ""), ("DELETE", ""), ("GET", "/$status"),
                                                ("GET", "/$events")])
def test_another_client_cannot_act_on_a_subscription(context: AppContext, method: str, suffix: str) -> None:
    sub = make(context, FULL_SUBSCRIBER, "pager", content="full-resource")
    with authorised_client(context, scope=FULL_SUBSCRIBER, client="intruder") as intruder:
        r = intruder.request(method, f"/fhir/Subscription/{sub['id']}{suffix}",
                             content=orjson.dumps(subscription(endpoint="https://intruder.example.org/hook",
                                                               content="full-resource")), headers=HEADERS)
    assert r.status_code == 403
    assert "lytestream/admin" in r.json()["issue"][0]["diagnostics"]
    with authorised_client(context, scope=FULL_SUBSCRIBER, client="pager") as owner:
        kept = owner.get(f"/fhir/Subscription/{sub['id']}").json()
    assert kept["channel"]["endpoint"] == HOOK and kept["status"] == "requested"


def test_a_client_searching_subscriptions_sees_only_its_own(context: AppContext) -> None:
    mine = make(context, SUBSCRIBER, "pager")
    make(context, SUBSCRIBER, "other-pager")
    with authorised_client(context, scope=SUBSCRIBER, client="pager") as pager:
        body = pager.get("/fhir/Subscription").json()
    assert [e["resource"]["id"] for e in body["entry"]] == [mine["id"]]
    assert body["total"] == 1


def test_the_admin_scope_acts_on_any_clients_subscription(context: AppContext) -> None:
    sub = make(context, SUBSCRIBER, "pager")
    make(context, SUBSCRIBER, "other-pager")
    with authorised_client(context, scope=ADMIN, client="operations") as ops:
        assert ops.get(f"/fhir/Subscription/{sub['id']}").status_code == 200
        assert ops.get("/fhir/Subscription").json()["total"] == 2
        assert ops.get(f"/fhir/Subscription/{sub['id']}/$status").status_code == 200
        assert ops.delete(f"/fhir/Subscription/{sub['id']}").status_code == 204


def test_the_admin_scope_does_not_stand_in_for_the_subscription_scope(context: AppContext) -> None:
    sub = make(context, SUBSCRIBER, "pager")
    with authorised_client(context, scope="system/Flag.r lytestream/admin", client="operations") as ops:
        assert ops.get(f"/fhir/Subscription/{sub['id']}").status_code == 403


def test_wildcard_clinical_scopes_are_not_the_admin_scope(context: AppContext) -> None:
    sub = make(context, SUBSCRIBER, "pager")
    with authorised_client(context, scope="system/*.cruds", client="integration") as wide:
        assert wide.get(f"/fhir/Subscription/{sub['id']}").status_code == 403


def test_a_subscription_whose_owner_was_never_recorded_is_served_to_the_admin_only(context: AppContext) -> None:
    sub = make(context, SUBSCRIBER, "pager")
    with context.db.session(write=True) as session:
        table = SubscriptionRecord.__table__  # type: ignore[attr-defined]
        session.execute(update(table).where(table.c.id == sub["id"]).values(owner_client=None))
    with authorised_client(context, scope=SUBSCRIBER, client="pager") as pager:
        assert pager.get(f"/fhir/Subscription/{sub['id']}").status_code == 403
    with authorised_client(context, scope=ADMIN, client="operations") as ops:
        assert ops.get(f"/fhir/Subscription/{sub['id']}").status_code == 200
