"""A create scope creates: a POST that would change a held result needs the update scope too.

Potassium 6.9 mmol/L stands for a result at or above the critical high of 6.5 mmol/L (RCPath G158 2017),
so it raises potassium-critical-high; withdrawing that result withdraws the Flag.
"""

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient

from service.api.context import AppContext
from tests.conftest import authorised_client
from tests.factories import HEADERS, LAB, bundle, dumps, insulin, observation

CREATE_ONLY = "system/Observation.c system/MedicationAdministration.c"
POTASSIUM = "2823-3"


def critical_potassium(ident: str = "k1", **kw: Any) -> dict[str, Any]:
    return observation(ident, code=POTASSIUM, value=6.9, **kw)


def active_rules(client: TestClient) -> list[str]:
    body = client.get("/fhir/Flag?status=active").json()
    return sorted(e["resource"]["code"]["coding"][0]["code"] for e in body.get("entry", []))


def held(client: TestClient, ident: str = "k1") -> dict[str, Any]:
    """The current version of the Observation with this identifier, read with the full scope."""
    body = client.get("/fhir/Observation?_count=100").json()
    (match,) = [e["resource"] for e in body["entry"] if e["resource"]["identifier"][0]["value"] == ident]
    return dict(match)


def test_create_only_token_cannot_withdraw_a_held_result_by_posting_it_again(
        client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    assert active_rules(client) == ["potassium-critical-high"]
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(critical_potassium(status="entered-in-error")),
                      headers=HEADERS)
    assert r.status_code == 403
    issue = r.json()["issue"][0]
    assert issue["code"] == "forbidden" and "system/Observation.cu" in issue["diagnostics"]
    assert 'scope="system/Observation.cu"' in r.headers["www-authenticate"]
    assert active_rules(client) == ["potassium-critical-high"]
    assert held(client)["status"] == "final" and held(client)["meta"]["versionId"] == "1"


def test_create_only_token_cannot_correct_a_held_result(client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(observation("k1", code=POTASSIUM, value=4.1,
                                                                     status="corrected")), headers=HEADERS)
    assert r.status_code == 403
    assert held(client)["valueQuantity"]["value"] == 6.9


def test_create_only_token_resending_an_identical_result_gets_200(client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    assert r.status_code == 200
    assert r.headers["etag"] == 'W/"1"'


def test_create_and_update_token_may_correct_by_post(client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope="system/Observation.cu", client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(critical_potassium(status="entered-in-error")),
                      headers=HEADERS)
    assert r.status_code == 200
    assert r.headers["etag"] == 'W/"2"'
    assert active_rules(client) == []


def test_create_only_token_cannot_change_a_held_insulin_administration(
        client: TestClient, context: AppContext) -> None:
    first = client.post("/fhir/MedicationAdministration", content=dumps(insulin("m1")), headers=HEADERS)
    assert first.status_code == 201
    with authorised_client(context, scope=CREATE_ONLY, client="mar-feed") as feed:
        r = feed.post("/fhir/MedicationAdministration",
                      content=dumps(insulin("m1", status="stopped", end="2026-03-02T07:00:00+00:00")),
                      headers=HEADERS)
    assert r.status_code == 403
    assert "system/MedicationAdministration.cu" in r.json()["issue"][0]["diagnostics"]
    location = first.headers["location"].removeprefix("http://testserver").split("/_history")[0]
    assert client.get(location).json()["status"] == "in-progress"


def test_create_only_token_cannot_replace_a_result_with_a_new_one(client: TestClient, context: AppContext) -> None:
    # observation-replaces hides the named result from the rules: it changes that result as surely as an update.
    first = client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    old = first.headers["location"].removeprefix("http://testserver/fhir/").split("/_history")[0]
    replacing = observation("k1-new", code=POTASSIUM, value=4.0, extension=[
        {"url": "http://hl7.org/fhir/StructureDefinition/observation-replaces", "valueReference": {"reference": old}}])
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(replacing), headers=HEADERS)
    assert r.status_code == 403
    assert active_rules(client) == ["potassium-critical-high"]


def test_batch_refuses_only_the_entry_that_would_change_a_held_result(
        client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir", content=dumps(bundle("batch", observation("new1"),
                                                    critical_potassium(status="entered-in-error"),
                                                    critical_potassium())), headers=HEADERS)
    assert r.status_code == 200
    statuses = [e["response"]["status"] for e in r.json()["entry"]]
    assert statuses == ["201 Created", "403 Forbidden", "200 OK"]
    issue = r.json()["entry"][1]["response"]["outcome"]["issue"][0]
    assert issue["code"] == "forbidden" and issue["expression"] == ["Bundle.entry[1]"]
    assert "system/Observation.cu" in issue["diagnostics"]
    assert active_rules(client) == ["potassium-critical-high"]


def test_transaction_with_an_entry_that_would_change_a_held_result_is_refused_whole(
        client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir", content=dumps(bundle("transaction", observation("new1"),
                                                    critical_potassium(status="entered-in-error"))),
                      headers=HEADERS)
    assert r.status_code == 403
    assert r.json()["issue"][0]["expression"] == ["Bundle.entry[1]"]
    assert client.get("/fhir/Observation").json()["total"] == 1
    assert active_rules(client) == ["potassium-critical-high"]


def test_create_only_token_gets_no_held_body_for_a_create_that_matched(
        client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(observation("k1", code=POTASSIUM, value=4.0)),
                      headers={**HEADERS, "prefer": "return=representation",
                               "if-none-exist": f"identifier={LAB}|k1"})
    assert r.status_code == 200
    body = r.json()
    assert body["resourceType"] == "OperationOutcome"
    assert "6.9" not in r.text


def test_create_only_token_gets_no_held_body_for_a_stale_create(client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope=CREATE_ONLY, client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(observation("k1", code=POTASSIUM, value=4.0,
                                                                     status="preliminary")),
                      headers={**HEADERS, "prefer": "return=representation"})
    assert r.status_code == 200
    assert r.json()["resourceType"] == "OperationOutcome"
    assert "6.9" not in r.text


def test_create_and_read_token_gets_the_held_body_for_a_create_that_matched(
        client: TestClient, context: AppContext) -> None:
    client.post("/fhir/Observation", content=dumps(critical_potassium()), headers=HEADERS)
    with authorised_client(context, scope="system/Observation.cr", client="lab-feed") as feed:
        r = feed.post("/fhir/Observation", content=dumps(observation("k1", code=POTASSIUM, value=4.0)),
                      headers={**HEADERS, "prefer": "return=representation",
                               "if-none-exist": f"identifier={LAB}|k1"})
    assert r.json()["valueQuantity"]["value"] == 6.9
