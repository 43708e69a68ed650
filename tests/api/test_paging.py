"""Fewer, better pages: every Flag version goes on flag-changed (for integrations), but the responder
topic flag-alert carries only what a responder must act on: raised, a priority rise, a worsening by a
policy step since the last page, closed and withdrawn.

Clinical values, with their sources:
- Sodium at or below 120 mmol/L is critical low (RCPath G158 2017); 118, 117.5 … 116 are all below it.
- The default worsening step for sodium is 2 mmol/L and for potassium 0.3 mmol/L (site policy:
  common practice, no source).
- Potassium below 3.5 mmol/L during IV insulin raises hypokalemia-on-insulin at once at medium
  priority (Umpierrez 2024, from memory); a second low at least 1 h later makes it high (common
  practice, no source).
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

import orjson
from fastapi.testclient import TestClient
from sqlalchemy import select

from service.api.context import AppContext
from service.clock import FixedClock
from service.db.tables import SubscriptionEvent
from service.main import build_context
from service.notify.topics import FLAG_ALERT, FLAG_CHANGED
from tests.api.test_subscriptions import subscription
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, insulin, observation

_E = SubscriptionEvent.__table__  # type: ignore[attr-defined]


def subscribe(client: TestClient, topic: str) -> str:
    r = client.post("/fhir/Subscription", content=orjson.dumps(subscription(topic=topic)), headers=HEADERS)
    assert r.status_code == 201, r.text
    return str(r.json()["id"])


def send(client: TestClient, *resources: dict[str, Any]) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", *resources)), headers=HEADERS)
    assert r.status_code == 200, r.text
    assert all(e["response"]["status"].startswith("20") for e in r.json()["entry"]), r.text


def sodium(ident: str, value: float, hour: int, **kw: Any) -> dict[str, Any]:
    return observation(ident, value=value, effective=f"2026-03-02T{hour:02d}:00:00+00:00", **kw)


def potassium(ident: str, value: float, time: str) -> dict[str, Any]:
    return observation(ident, code="2823-3", value=value, effective=f"2026-03-02T{time}:00+00:00")


def events(context: AppContext, subscription_id: str) -> list[tuple[str, int]]:
    """The (Flag id, version) of every numbered event queued for the subscription, in number order."""
    with context.db.session() as session:
        rows = session.execute(select(_E.c.focus_id, _E.c.focus_version)
                               .where(_E.c.subscription_id == subscription_id, _E.c.number.is_not(None))
                               .order_by(_E.c.number)).all()
    return [(fid, version) for fid, version in rows]


def versions(events_: list[tuple[str, int]]) -> list[int]:
    return [v for _, v in events_]


def test_hourly_critical_results_at_the_same_level_page_once_but_make_a_version_each(
    client: TestClient, context: AppContext
) -> None:
    changed, alert = subscribe(client, FLAG_CHANGED), subscribe(client, FLAG_ALERT)
    for hour in (8, 9, 10, 11):
        send(client, sodium(f"na{hour}", 118, hour))
    assert versions(events(context, changed)) == [1, 2, 3, 4]
    assert versions(events(context, alert)) == [1]


def test_a_worsening_by_one_step_pages_again(client: TestClient, context: AppContext) -> None:
    alert = subscribe(client, FLAG_ALERT)
    send(client, sodium("na8", 118, 8))
    send(client, sodium("na9", 118, 9))
    send(client, sodium("na10", 116, 10))  # 2 mmol/L lower than the page: one step
    assert versions(events(context, alert)) == [1, 3]


def test_creeping_sub_step_worsening_pages_once_it_sums_to_a_step(client: TestClient, context: AppContext) -> None:
    alert = subscribe(client, FLAG_ALERT)
    for hour, value in ((6, 118), (7, 117.5), (8, 117), (9, 116.5), (10, 116), (11, 115.5)):
        send(client, sodium(f"na{hour}", value, hour))
    # 0.5 mmol/L an hour: no one version is a step worse than the one before, but 116 is 2 below the page
    assert versions(events(context, alert)) == [1, 5]


def test_a_priority_rise_pages(client: TestClient, context: AppContext, clock: FixedClock) -> None:
    alert = subscribe(client, FLAG_ALERT)
    send(client, insulin("m1", start="2026-03-02T10:00:00+00:00"), potassium("k1", 3.4, "11:30"))  # medium
    clock.advance(timedelta(minutes=30))
    # a second low an hour later: high; 0.05 lower, less than the 0.3 step
    send(client, potassium("k2", 3.35, "12:30"))
    (flag,) = client.get("/fhir/Flag?code=hypokalemia-on-insulin").json()["entry"]
    assert flag["resource"]["meta"]["versionId"] == "2"
    assert versions(events(context, alert)) == [1, 2]


def test_closing_pages(client: TestClient, context: AppContext) -> None:
    alert = subscribe(client, FLAG_ALERT)
    send(client, sodium("na8", 118, 8))
    send(client, sodium("na9", 118, 9))
    send(client, sodium("na10", 121, 10))  # above the limit of 120: the Flag closes
    (flag,) = client.get("/fhir/Flag").json()["entry"]
    assert flag["resource"]["status"] == "inactive"
    assert versions(events(context, alert)) == [1, 3]


def test_withdrawing_pages(client: TestClient, context: AppContext) -> None:
    alert = subscribe(client, FLAG_ALERT)
    send(client, sodium("na8", 118, 8))
    send(client, sodium("na8", 118, 8, status="entered-in-error"))
    (flag,) = client.get("/fhir/Flag").json()["entry"]
    assert flag["resource"]["status"] == "entered-in-error"
    assert versions(events(context, alert)) == [1, 2]


def test_the_responder_topic_honours_the_same_filters(client: TestClient, context: AppContext) -> None:
    body = subscription(topic=FLAG_ALERT, filters="Flag?patient=Patient/p2")
    r = client.post("/fhir/Subscription", content=orjson.dumps(body), headers=HEADERS)
    assert r.status_code == 201, r.text
    send(client, sodium("na8", 118, 8))
    send(client, sodium("other", 118, 8, patient="Patient/p2"))
    got = events(context, r.json()["id"])
    assert len(got) == 1
    flag = client.get(f"/fhir/Flag/{got[0][0]}").json()
    assert flag["subject"]["reference"] == "Patient/p2"


def test_what_was_paged_is_kept_on_the_flag_row_so_a_restarted_service_agrees(
    client: TestClient, context: AppContext
) -> None:
    alert = subscribe(client, FLAG_ALERT)
    send(client, sodium("na8", 118, 8))
    restarted = build_context(context.settings, clock=context.clock)  # a new process on the same store
    try:
        with authorised_client(restarted) as again:
            send(again, sodium("na9", 117, 9))  # 1 below the page: not a step
            send(again, sodium("na10", 116, 10))  # 2 below the page sent by the first process
    finally:
        restarted.db.dispose()
    assert versions(events(context, alert)) == [1, 3]
