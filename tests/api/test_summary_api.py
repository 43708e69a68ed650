"""``GET /fhir/Flag/$summary`` through the API: the figures match a hand count of what each test did."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from collections.abc import Iterator
from datetime import timedelta
from typing import Any

import httpx
import orjson
import pytest
import respx
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.auth.tokens import mint
from service.clock import FixedClock
from service.fhir.render import CAUTION
from service.main import create_app
from service.notify.topics import FLAG_CHANGED
from tests.factories import HEADERS, bundle, dumps, observation

DAY = "start=2026-03-02&end=2026-03-03"  # the clock fixture starts at 2026-03-02T12:00Z
HOOK = "https://pager.example.org/summary-hook"
SD = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"


def client_for(ctx: AppContext, scope: str) -> TestClient:
    with ctx.db.session(write=True) as session:
        token = mint(session, client="test-suite", scope=scope, now=ctx.clock.now())
    return TestClient(create_app(context=ctx), headers={"Authorization": f"Bearer {token}"})


@pytest.fixture
def api(context: AppContext) -> Iterator[TestClient]:
    with client_for(context, "system/*.cruds") as c:
        yield c


def send(api: TestClient, *resources: dict[str, Any]) -> None:
    r = api.post("/fhir", content=dumps(bundle("batch", *resources)), headers=HEADERS)
    assert r.status_code == 200, r.text
    assert all(e["response"]["status"].startswith("20") for e in r.json()["entry"]), r.text


def flag_of(api: TestClient, rule: str) -> str:
    body = api.get(f"/fhir/Flag?code={rule}").json()
    (entry,) = [e for e in body["entry"] if e["search"]["mode"] == "match"]
    return str(entry["resource"]["id"])


def figures(parameters: list[dict[str, Any]]) -> dict[str, Any]:
    """The Parameters answer read back as the object it carries: parts become nested objects."""
    out: dict[str, Any] = {}
    for p in parameters:
        if "part" in p:
            out[p["name"]] = figures(p["part"])
        else:
            (value,) = [v for k, v in p.items() if k.startswith("value")]
            out[p["name"]] = value
    return out


def summary(api: TestClient, query: str = DAY) -> dict[str, Any]:
    r = api.get(f"/fhir/Flag/$summary?{query}")
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["resourceType"] == "Parameters"
    return figures(body["parameter"])


@pytest.fixture
def ward(api: TestClient, context: AppContext, clock: FixedClock) -> dict[str, Any]:
    """What the test does, by hand:

    12:00  p1 sodium 118 (issued 11:50)  → sodium-critical-low, high   (result → flag 600 s)
           p2 potassium 6.9 (issued 11:58) → potassium-critical-high, high (result → flag 120 s)
           p3 sodium 138                  → no flag
    12:05  the sodium Flag is acknowledged                             (flag → ack 300 s)
    12:16  escalation: only the potassium Flag is unacknowledged        (1 escalation, 1 flag)
    """
    send(api, observation("na1", value=118, patient="Patient/p1", issued="2026-03-02T11:50:00+00:00"),
         observation("k1", code="2823-3", value=6.9, patient="Patient/p2",
                     issued="2026-03-02T11:58:00+00:00"),
         observation("na2", value=138, patient="Patient/p3"))
    sodium = flag_of(api, "sodium-critical-low")
    clock.advance(timedelta(minutes=5))
    r = api.post(f"/fhir/Flag/{sodium}/$acknowledge", content=b"", headers=HEADERS)
    assert r.status_code == 200, r.text
    clock.advance(timedelta(minutes=11))
    context.evaluator.escalate(context.db, clock.now())
    return summary(api)


def test_flags_raised_are_counted_by_rule(ward: dict[str, Any]) -> None:
    assert ward["flags_by_rule"] == {"potassium-critical-high": 1, "sodium-critical-low": 1}


def test_flags_raised_are_counted_by_priority(ward: dict[str, Any]) -> None:
    assert (ward["flags_raised"], ward["flags_by_priority"]) == (2, {"PH": 2})


def test_burden_counts_every_result_stored_and_each_patient_day(ward: dict[str, Any]) -> None:
    burden = ward["alert_burden"]
    assert (burden["results_stored"], burden["patient_days"]) == (3, 3)
    assert burden["flags_per_1000_results"] == pytest.approx(2 * 1000 / 3)
    assert burden["flags_per_patient_day"] == pytest.approx(2 / 3)


def test_result_to_flag_runs_from_issued(ward: dict[str, Any]) -> None:
    lat = ward["result_to_flag"]
    # 120 s and 600 s: nearest-rank median is rank 1 → 120; p90 is rank 2 → 600
    assert (lat["count"], lat["median_seconds"], lat["p90_seconds"]) == (2, 120.0, 600.0)
    assert (lat["median_minutes"], lat["p90_minutes"]) == (2.0, 10.0)


def test_flag_to_acknowledgement_is_the_time_the_clock_moved(ward: dict[str, Any]) -> None:
    ack = ward["flag_to_acknowledgement"]
    figures = (ack["count"], ack["median_seconds"], ack["p90_seconds"], ack["unacknowledged"])
    assert figures == (1, 300.0, 300.0, 1)


def test_only_the_unacknowledged_flag_was_escalated(ward: dict[str, Any]) -> None:
    assert ward["escalations"] == {"count": 1, "flags_escalated": 1}


def test_the_acknowledgement_is_also_counted_from_the_audit_trail(ward: dict[str, Any]) -> None:
    assert ward["audit_events_by_subtype"]["acknowledge"] == 1


def test_the_summary_carries_the_caution(ward: dict[str, Any]) -> None:
    assert ward["caution"] == CAUTION


def test_a_range_ending_before_the_flags_were_raised_counts_none(ward: dict[str, Any],
                                                                 api: TestClient) -> None:
    early = summary(api, "start=2026-03-02&end=2026-03-02T12:00:00Z")
    assert (ward["flags_raised"], early["flags_raised"]) == (2, 0)


def test_the_summary_request_is_itself_audited(api: TestClient) -> None:
    summary(api)
    events = api.get("/fhir/AuditEvent?subtype=summary").json()
    assert events["total"] == 1


def test_without_auditevent_search_scope_the_summary_is_refused(context: AppContext) -> None:
    with client_for(context, "system/Flag.rs") as flag_only:
        assert flag_only.get(f"/fhir/Flag/$summary?{DAY}").status_code == 403


def test_without_flag_search_scope_the_summary_is_refused(context: AppContext) -> None:
    with client_for(context, "system/AuditEvent.rs") as audit_only:
        assert audit_only.get(f"/fhir/Flag/$summary?{DAY}").status_code == 403


def test_a_missing_end_is_a_400(api: TestClient) -> None:
    assert api.get("/fhir/Flag/$summary?start=2026-03-02").status_code == 400


def test_an_end_before_the_start_is_a_400(api: TestClient) -> None:
    assert api.get("/fhir/Flag/$summary?start=2026-03-03&end=2026-03-02").status_code == 400


def test_an_unknown_parameter_is_a_400(api: TestClient) -> None:
    assert api.get(f"/fhir/Flag/$summary?{DAY}&patient=Patient/p1").status_code == 400


# ----------------------------------------------------------------------------------- notifications


def subscribe(api: TestClient) -> None:
    content = {"url": f"{SD}/backport-payload-content", "valueCode": "id-only"}
    sub = {"resourceType": "Subscription", "status": "requested", "reason": "summary test",
           "criteria": FLAG_CHANGED,
           "channel": {"type": "rest-hook", "endpoint": HOOK, "payload": "application/fhir+json",
                       "_payload": {"extension": [content]}}}
    r = api.post("/fhir/Subscription", content=orjson.dumps(sub), headers=HEADERS)
    assert r.status_code == 201, r.text


@pytest.fixture
def hook() -> Iterator[respx.Route]:
    with respx.mock(assert_all_called=False) as mock:
        yield mock.post(HOOK)


def test_a_retried_delivery_counts_as_delivered_and_retried(
    api: TestClient, context: AppContext, clock: FixedClock, hook: respx.Route
) -> None:
    hook.side_effect = [httpx.Response(200), httpx.Response(503), httpx.Response(200)]
    subscribe(api)
    context.dispatcher.run_once()                      # handshake: 1 try, sent
    send(api, observation("na1", value=118))           # one Flag → one event row
    context.dispatcher.run_once()                      # event: try 1 fails
    clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
    context.dispatcher.run_once()                      # event: try 2 succeeds
    n = summary(api)["notifications"]
    assert (n["count"], n["delivered"], n["retried"], n["failed"], n["attempts"]) == (2, 2, 1, 0, 3)


def test_a_delivery_given_up_counts_as_failed(
    api: TestClient, context: AppContext, clock: FixedClock, hook: respx.Route
) -> None:
    tries = context.dispatcher.policy.attempts(urgent=True)  # sodium 118 raises a high-priority Flag
    hook.side_effect = [httpx.Response(200)] + [httpx.ConnectError("refused")] * tries
    subscribe(api)
    context.dispatcher.run_once()
    send(api, observation("na1", value=118))
    for _ in range(tries + 1):
        context.dispatcher.run_once()
        clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
    n = summary(api, "start=2026-03-02&end=2026-03-04")
    assert (n["notifications"]["failed"], n["notifications"]["attempts"]) == (1, 1 + tries)


# ---------------------------------------------------------------------------- results not evaluated


def test_results_stored_but_not_evaluated_are_counted_by_reason(api: TestClient) -> None:
    send(api, observation("blank", value=None, patient="Patient/p1"),
         observation("urine", code="2955-3", value=40, patient="Patient/p1"),   # sodium in urine
         observation("na", value=138, patient="Patient/p1"))
    s = summary(api)
    assert s["alert_burden"]["results_stored"] == 3
    assert s["results_not_evaluated"] == {"count": 2, "by_reason": {"no-numeric-value": 1, "urine": 1}}


def test_a_result_later_resulted_is_no_longer_counted_as_not_evaluated(api: TestClient) -> None:
    send(api, observation("na", value=None, status="registered", patient="Patient/p1"))
    assert summary(api)["results_not_evaluated"]["by_reason"] == {"status-registered": 1}
    send(api, observation("na", value=138, patient="Patient/p1"))
    assert summary(api)["results_not_evaluated"] == {"count": 0}  # an empty by_reason is left out
