"""Every resource the service emits validates with fhir.resources R4B (the FHIR R4B models)."""

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient
from fhir.resources.R4B import get_fhir_model_class

from tests.factories import HEADERS, bundle, dumps, observation


def valid(body: dict[str, Any]) -> None:
    get_fhir_model_class(body["resourceType"]).model_validate(body)


def test_capability_statement_validates_and_says_r4(client: TestClient) -> None:
    body = client.get("/fhir/metadata").json()
    valid(body)
    assert body["fhirVersion"] == "4.0.1"
    assert {i["code"] for i in body["rest"][0]["interaction"]} == {"transaction", "batch"}


def test_operation_outcome_validates(client: TestClient) -> None:
    r = client.post("/fhir", content=b"[", headers=HEADERS)
    valid(r.json())


def test_transaction_and_batch_responses_validate(client: TestClient) -> None:
    for kind in ("transaction", "batch"):
        r = client.post("/fhir", content=dumps(bundle(kind, observation(f"{kind}-1"), observation(f"{kind}-2",
                        status="bogus" if kind == "batch" else "final"))),
                        headers={**HEADERS, "prefer": "return=representation"})
        valid(r.json())


def test_search_history_and_read_validate(client: TestClient) -> None:
    loc = client.post("/fhir/Observation", content=dumps(observation()), headers=HEADERS).headers["location"]
    path = loc.removeprefix("http://testserver").split("/_history")[0]
    valid(client.get(path).json())
    valid(client.get(f"{path}/_history").json())
    valid(client.get("/fhir/Observation?patient=Patient/p1").json())


def test_capability_statement_advertises_every_subscription_topic(client: TestClient) -> None:
    body = client.get("/fhir/metadata").json()
    sub = next(r for r in body["rest"][0]["resource"] if r["type"] == "Subscription")
    topics = {e["valueCanonical"] for e in sub["extension"]}
    assert topics == {"https://lytestream.example/fhir/SubscriptionTopic/flag-changed",
                      "https://lytestream.example/fhir/SubscriptionTopic/flag-alert",
                      "https://lytestream.example/fhir/SubscriptionTopic/flag-escalated"}


def test_capability_statement_says_what_the_responder_topic_carries(client: TestClient) -> None:
    body = client.get("/fhir/metadata").json()
    sub = next(r for r in body["rest"][0]["resource"] if r["type"] == "Subscription")
    assert "Topic https://lytestream.example/fhir/SubscriptionTopic/flag-alert: The Flag versions a responder " \
           "must act on" in sub["documentation"]
    assert "Filters: code, patient, patient:identifier, priority." in sub["documentation"]


def test_served_subscription_validates(client: TestClient) -> None:
    import orjson

    from tests.api.test_subscriptions import subscription

    created = client.post("/fhir/Subscription", content=orjson.dumps(subscription()), headers=HEADERS).json()
    valid(created)
    valid(client.get(f"/fhir/Subscription/{created['id']}").json())
    valid(client.get("/fhir/Subscription").json())
    valid(client.get(f"/fhir/Subscription/{created['id']}/$status").json())
