"""POST and conditional PUT of single Observations: idempotence, versions, corrections."""

from __future__ import annotations

from fastapi.testclient import TestClient

from tests.factories import HEADERS, LAB, dumps, observation


def post(client: TestClient, body: dict, **headers: str):  # type: ignore[no-untyped-def]
    return client.post("/fhir/Observation", content=dumps(body), headers={**HEADERS, **headers})


def put(client: TestClient, body: dict, ident: str = "R1"):  # type: ignore[no-untyped-def]
    return client.put(f"/fhir/Observation?identifier={LAB}|{ident}", content=dumps(body), headers=HEADERS)


def test_create_observation_returns_201_with_location_and_etag(client: TestClient) -> None:
    r = post(client, observation())
    assert r.status_code == 201
    assert r.headers["etag"] == 'W/"1"'
    assert r.headers["location"].startswith("http://testserver/fhir/Observation/")
    assert r.headers["location"].endswith("/_history/1")
    assert r.json()["meta"]["versionId"] == "1"


def test_identical_resend_changes_nothing(client: TestClient) -> None:
    first = post(client, observation())
    again = post(client, observation())
    assert again.status_code == 200
    assert again.headers["location"] == first.headers["location"]
    history = client.get(first.headers["location"].split("/_history")[0].removeprefix("http://testserver") + "/_history")
    assert history.json()["total"] == 1


def test_amended_result_makes_a_new_version(client: TestClient) -> None:
    post(client, observation(value=118))
    r = put(client, observation(value=128, status="amended"))
    assert r.status_code == 200
    assert r.headers["etag"] == 'W/"2"'
    assert r.json()["valueQuantity"]["value"] == 128


def test_preliminary_after_final_is_not_applied(client: TestClient) -> None:
    post(client, observation(value=118, status="final"))
    r = post(client, observation(value=140, status="preliminary"), prefer="return=OperationOutcome")
    assert r.status_code == 200
    assert r.headers["etag"] == 'W/"1"'
    assert any(i["severity"] == "warning" for i in r.json()["issue"])
    current = client.get(r.headers["location"].removeprefix("http://testserver").split("/_history")[0])
    assert current.json()["valueQuantity"]["value"] == 118


def test_final_after_preliminary_replaces_it(client: TestClient) -> None:
    post(client, observation(value=118, status="preliminary"))
    r = post(client, observation(value=119, status="final"))
    assert r.headers["etag"] == 'W/"2"'


def test_entered_in_error_is_final_even_if_the_original_arrives_later(client: TestClient) -> None:
    post(client, observation(value=118, status="entered-in-error"))
    r = post(client, observation(value=118, status="final"))
    assert r.headers["etag"] == 'W/"1"'
    current = client.get(r.headers["location"].removeprefix("http://testserver").split("/_history")[0])
    assert current.json()["status"] == "entered-in-error"


def test_older_correction_arriving_late_does_not_replace_newer_one(client: TestClient) -> None:
    post(client, observation(value=125, status="corrected", issued="2026-03-02T10:00:00+00:00"))
    r = post(client, observation(value=121, status="corrected", issued="2026-03-02T09:00:00+00:00"))
    assert r.headers["etag"] == 'W/"1"'


def test_if_none_exist_ignores_a_create_for_a_held_identifier(client: TestClient) -> None:
    post(client, observation(value=118))
    r = post(client, observation(value=140), **{"if-none-exist": f"identifier={LAB}|R1"})
    assert r.status_code == 200
    assert r.json()["valueQuantity"]["value"] == 118


def test_conditional_update_creates_when_nothing_matches(client: TestClient) -> None:
    r = put(client, observation("NEW"), ident="NEW")
    assert r.status_code == 201


def test_conditional_update_must_name_the_resources_identifier(client: TestClient) -> None:
    r = put(client, observation("R1"), ident="OTHER")
    assert r.status_code == 400
    assert r.json()["issue"][0]["expression"] == ["Observation"]


def test_prefer_minimal_returns_no_body(client: TestClient) -> None:
    r = post(client, observation(), prefer="return=minimal")
    assert r.status_code == 201
    assert r.content == b""


def test_vread_returns_each_version(client: TestClient) -> None:
    loc = post(client, observation(value=118)).headers["location"].removeprefix("http://testserver")
    put(client, observation(value=121, status="amended"))
    base = loc.split("/_history")[0]
    assert client.get(f"{base}/_history/1").json()["valueQuantity"]["value"] == 118
    assert client.get(f"{base}/_history/2").json()["valueQuantity"]["value"] == 121
    assert client.get(f"{base}/_history/3").status_code == 404
