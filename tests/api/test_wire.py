"""The FHIR base and formats on the wire (http://hl7.org/fhir/R4/http.html)."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

from tests.factories import HEADERS, bundle, dumps, observation


# http.html#transaction: the base URL is [base]; a trailing slash names the same endpoint.
def test_a_bundle_posted_to_the_base_with_a_trailing_slash_is_processed(client: TestClient) -> None:
    # Answered in place, not redirected: a client need not follow a redirect of a POST.
    r = client.post("/fhir/", content=dumps(bundle("batch", observation("slash"))), headers=HEADERS,
                    follow_redirects=False)
    assert r.status_code == 200, r.text
    assert r.json()["type"] == "batch-response"


# http.html#mime: a server that cannot answer in the requested format answers 406 Not Acceptable.
@pytest.mark.parametrize("accept", ["application/fhir+xml", "application/xml", "application/fhir+xml;q=1, text/xml"])
def test_asking_for_xml_only_is_a_406(client: TestClient, accept: str) -> None:
    r = client.get("/fhir/Observation", headers={"Accept": accept})
    assert r.status_code == 406
    assert r.json()["resourceType"] == "OperationOutcome"
    assert "application/fhir+json" in r.json()["issue"][0]["diagnostics"]


@pytest.mark.parametrize("fmt", ["xml", "application/fhir+xml"])
def test_format_xml_is_a_406(client: TestClient, fmt: str) -> None:
    assert client.get(f"/fhir/Observation?_format={fmt}").status_code == 406


@pytest.mark.parametrize("accept", ["application/fhir+json", "application/json", "*/*",
                                    "application/fhir+xml, application/fhir+json;q=0.5", "text/html, */*;q=0.8"])
def test_json_or_anything_is_answered(client: TestClient, accept: str) -> None:
    assert client.get("/fhir/Observation", headers={"Accept": accept}).status_code == 200


def test_a_json_type_refused_by_q_zero_is_not_acceptable(client: TestClient) -> None:
    r = client.get("/fhir/Observation", headers={"Accept": "application/fhir+json;q=0, application/fhir+xml"})
    assert r.status_code == 406


def test_a_wrong_path_answers_an_outcome_naming_the_fhir_base(client: TestClient) -> None:
    r = client.get("/Observation")
    assert r.status_code == 404
    body = r.json()
    assert body["resourceType"] == "OperationOutcome"
    assert "http://testserver/fhir" in body["issue"][0]["diagnostics"]
