"""The questions auditors ask, answered by plain FHIR search (README, Search: "Questions auditors ask").

Sodium 118 / 115 mmol/L are at or below the critical low of 120 mmol/L (RCPath G158 2017; Kost GJ, JAMA
1990;263:704-707): each raises a sodium-critical-low Flag, one patient each.
"""

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
from service.clock import FixedClock
from service.notify.topics import FLAG_CHANGED
from tests.api.test_summary_api import HOOK, SD
from tests.factories import HEADERS, bundle, dumps, observation


def send(client: TestClient, *resources: dict[str, Any]) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", *resources)), headers=HEADERS)
    assert r.status_code == 200, r.text


def flag_ids(client: TestClient, query: str) -> set[str]:
    r = client.get(f"/fhir/Flag?{query}")
    assert r.status_code == 200, r.text
    return {e["resource"]["id"] for e in r.json().get("entry", []) if e["search"]["mode"] == "match"}


def flag_of(client: TestClient, patient: str) -> str:
    (fid,) = flag_ids(client, f"patient={patient}")
    return fid


@pytest.fixture
def acked(client: TestClient, clock: FixedClock) -> dict[str, str]:
    """12:00 three Flags (p1 on ward Encounter/w1, p2 and p3 on Encounter/w2); p1's is acknowledged at
    12:03, p2's at 12:40, p3's never."""
    send(client, observation("a", value=118, patient="Patient/p1", encounter={"reference": "Encounter/w1"}),
         observation("b", value=115, patient="Patient/p2", encounter={"reference": "Encounter/w2"}),
         observation("c", value=118, patient="Patient/p3", encounter={"reference": "Encounter/w2"}))
    ids = {p: flag_of(client, f"Patient/{p}") for p in ("p1", "p2", "p3")}
    clock.advance(timedelta(minutes=3))
    assert client.post(f"/fhir/Flag/{ids['p1']}/$acknowledge", content=b"", headers=HEADERS).status_code == 200
    clock.advance(timedelta(minutes=37))
    assert client.post(f"/fhir/Flag/{ids['p2']}/$acknowledge", content=b"", headers=HEADERS).status_code == 200
    return ids


def test_flags_never_acknowledged(client: TestClient, acked: dict[str, str]) -> None:
    assert flag_ids(client, "acknowledged=false") == {acked["p3"]}
    assert flag_ids(client, "acknowledged=true") == {acked["p1"], acked["p2"]}


def test_flags_acknowledged_after_more_than_n_minutes(client: TestClient, acked: dict[str, str]) -> None:
    assert flag_ids(client, "acknowledged-after=gt30") == {acked["p2"]}  # 40 min; p3 never: no delay
    assert flag_ids(client, "acknowledged-after=le3") == {acked["p1"]}  # exactly 3 min: le includes it
    assert flag_ids(client, "acknowledged-after=gt3") == {acked["p2"]}
    assert flag_ids(client, "acknowledged-after=gt3&acknowledged-after=lt40") == set()  # ANDed


def test_flags_by_rule_and_ward(client: TestClient, acked: dict[str, str]) -> None:
    assert flag_ids(client, "code=sodium-critical-low&encounter=Encounter/w2") == {acked["p2"], acked["p3"]}
    assert flag_ids(client, "code=potassium-critical-high&encounter=Encounter/w2") == set()


def test_an_acknowledgement_delay_that_is_no_number_is_a_400_naming_the_parameter(client: TestClient) -> None:
    r = client.get("/fhir/Flag?acknowledged-after=gtthirty")
    assert r.status_code == 400
    assert "acknowledged-after" in r.json()["issue"][0]["diagnostics"]


def test_acknowledged_must_be_true_or_false(client: TestClient) -> None:
    r = client.get("/fhir/Flag?acknowledged=maybe")
    assert r.status_code == 400 and r.json()["resourceType"] == "OperationOutcome"


def test_who_read_a_patients_flags(client: TestClient, acked: dict[str, str]) -> None:
    assert client.get("/fhir/Flag?patient=Patient/p3").status_code == 200
    r = client.get("/fhir/AuditEvent?patient=Patient/p3&subtype=search-type")
    events = [e["resource"] for e in r.json()["entry"]]
    assert events and all(e["agent"][0]["who"]["identifier"]["value"] == "test-suite" for e in events)
    assert any("GET Flag?patient=Patient/p3" in orjson.dumps(e).decode() for e in events)


@pytest.fixture
def failing_hook() -> Iterator[respx.Route]:
    with respx.mock(assert_all_called=False) as mock:
        route = mock.post(HOOK)
        route.side_effect = [httpx.Response(200)] + [httpx.Response(503)] * 50
        yield route


def test_notifications_that_failed(client: TestClient, context: AppContext, clock: FixedClock,
                                   failing_hook: respx.Route) -> None:
    # A full-resource subscription: its notifications carry the patient's Flag, so each one the receiver
    # answered is a disclosure AuditEvent, with outcome 4 when it refused it.
    content = {"url": f"{SD}/backport-payload-content", "valueCode": "full-resource"}
    sub = {"resourceType": "Subscription", "status": "requested", "reason": "failed notifications",
           "criteria": FLAG_CHANGED, "channel": {"type": "rest-hook", "endpoint": HOOK,
                                                 "payload": "application/fhir+json",
                                                 "_payload": {"extension": [content]}}}
    assert client.post("/fhir/Subscription", content=orjson.dumps(sub), headers=HEADERS).status_code == 201
    context.dispatcher.run_once()  # handshake accepted
    send(client, observation("k", value=118, patient="Patient/p9"))
    context.dispatcher.run_once()  # the event: 503
    r = client.get("/fhir/AuditEvent?subtype=disclose&outcome=4")
    assert r.status_code == 200, r.text
    (event,) = [e["resource"] for e in r.json()["entry"]]
    assert event["outcome"] == "4" and "did not accept" in event["outcomeDesc"]
    assert client.get("/fhir/AuditEvent?subtype=disclose&outcome=0").json().get("entry", []) == []


def test_the_auditor_parameters_are_declared_and_served(client: TestClient) -> None:
    cap = client.get("/fhir/metadata").json()
    flag = next(r for r in cap["rest"][0]["resource"] if r["type"] == "Flag")
    declared = {p["name"]: p.get("definition") for p in flag["searchParam"]}
    for name in ("acknowledged", "acknowledged-after"):
        sp = client.get(f"/fhir/SearchParameter/Flag-{name}")
        assert sp.status_code == 200 and sp.json()["code"] == name
        assert declared[name] == sp.json()["url"]
    assert "encounter" in declared
    audit = next(r for r in cap["rest"][0]["resource"] if r["type"] == "AuditEvent")
    assert "outcome" in {p["name"] for p in audit["searchParam"]}
