"""Every kind of bad input gets an OperationOutcome with severity, code, FHIRPath and the right status."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.clock import FixedClock
from service.config import Settings
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation


def send(client: TestClient, body: object, path: str = "/fhir") -> tuple[int, dict]:
    r = client.post(path, content=body if isinstance(body, bytes) else dumps(body), headers=HEADERS)
    return r.status_code, r.json()


def first(outcome: dict) -> dict:
    assert outcome["resourceType"] == "OperationOutcome"
    issue = outcome["issue"][0]
    assert issue["severity"] in ("error", "fatal")
    return issue


def test_malformed_json_is_a_400_structure_issue(client: TestClient) -> None:
    status, body = send(client, b'{"resourceType": "Bundle", ')
    assert status == 400
    assert first(body)["code"] == "structure"


def test_wrong_resource_type_on_observation_endpoint(client: TestClient) -> None:
    status, body = send(client, {"resourceType": "Patient"}, "/fhir/Observation")
    assert status == 400
    assert first(body)["expression"] == ["Observation.resourceType"]


def test_bundle_type_other_than_transaction_or_batch_is_not_supported(client: TestClient) -> None:
    status, body = send(client, {"resourceType": "Bundle", "type": "collection", "entry": []})
    assert status == 400
    assert first(body)["code"] == "not-supported"
    assert first(body)["expression"] == ["Bundle.type"]


@pytest.mark.parametrize("missing", ["status", "code"])
def test_missing_required_element_names_it(client: TestClient, missing: str) -> None:
    obs = observation()
    obs.pop(missing)
    status, body = send(client, obs, "/fhir/Observation")
    assert status == 400
    assert first(body)["code"] == "required"
    assert first(body)["expression"] == [f"Observation.{missing}"]


def test_missing_subject_is_refused(client: TestClient) -> None:
    obs = observation()
    obs.pop("subject")
    status, body = send(client, obs, "/fhir/Observation")
    assert status == 422
    assert first(body)["expression"] == ["Observation.subject"]


def test_unknown_status_code_is_refused(client: TestClient) -> None:
    status, body = send(client, observation(status="done"), "/fhir/Observation")
    assert status == 400
    assert first(body)["code"] == "code-invalid"
    assert "done" in first(body)["diagnostics"]


def test_two_value_choices_are_refused(client: TestClient) -> None:
    status, body = send(client, observation(valueString="high"), "/fhir/Observation")
    assert status == 400
    # Each variant sent, as FHIRPath (value[x] is the definition's name, not a path).
    assert first(body)["expression"] == ["Observation.valueQuantity", "Observation.valueString"]


def test_unit_not_allowed_names_the_unit_and_the_accepted_ones(client: TestClient) -> None:
    # Glucose [Mass/volume] (2345-7) takes mg/dL only: a molar unit under a mass code is refused.
    status, body = send(client, observation(code="2345-7", value=5.5, unit="mmol/L"), "/fhir/Observation")
    assert status == 422
    assert "'mmol/L'" in first(body)["diagnostics"] and "mg/dL" in first(body)["diagnostics"]


def test_offsetless_datetime_is_refused_with_its_path(client: TestClient) -> None:
    status, body = send(client, bundle("batch", observation(effective="2026-03-02T08:00:00")))
    assert status == 200
    response = body["entry"][0]["response"]
    assert response["status"].startswith("400")
    assert response["outcome"]["issue"][0]["expression"] == ["Bundle.entry[0].resource.effectiveDateTime"]


def test_bundle_over_the_entry_limit_is_413(context, client: TestClient) -> None:  # type: ignore[no-untyped-def]
    limit = context.settings.max_bundle_entries
    status, body = send(client, bundle("batch", *[observation(f"R{i}") for i in range(limit + 1)]))
    assert status == 413
    assert first(body)["code"] == "too-costly"


def test_body_over_the_byte_limit_is_413(tmp_path: Path, clock: FixedClock) -> None:
    settings = Settings(data_dir=tmp_path, max_body_bytes=2000, scheduler=False)
    ctx = build_context(settings, clock=clock)
    with authorised_client(ctx) as small:
        status, body = send(small, bundle("batch", *[observation(f"R{i}") for i in range(20)]))
    ctx.db.dispose()
    assert status == 413


def test_reference_to_missing_urn_uuid_fails_the_transaction(client: TestClient) -> None:
    obs = observation(patient="urn:uuid:00000000-0000-4000-8000-000000000001")
    status, body = send(client, bundle("transaction", observation("ok"), obs))
    assert status == 400
    assert first(body)["code"] == "not-found"
    assert first(body)["expression"] == ["Bundle.entry[1].resource.subject.reference"]
    assert client.get("/fhir/Observation").json()["total"] == 0


def test_unsupported_content_type_is_415(client: TestClient) -> None:
    r = client.post("/fhir", content=b"<Bundle/>", headers={"content-type": "application/fhir+xml"})
    assert r.status_code == 415
    assert first(r.json())["code"] == "not-supported"


def test_missing_identifier_is_refused_because_resends_key_on_it(client: TestClient) -> None:
    obs = observation()
    obs.pop("identifier")
    status, body = send(client, obs, "/fhir/Observation")
    assert status == 422
    assert first(body)["expression"] == ["Observation.identifier"]


def test_date_without_time_of_day_is_refused(client: TestClient) -> None:
    status, body = send(client, observation(effective="2026-03-02"), "/fhir/Observation")
    assert status == 422
    assert first(body)["expression"] == ["Observation.effectiveDateTime"]


def test_entry_without_request_is_refused_in_a_transaction(client: TestClient) -> None:
    status, body = send(client, {"resourceType": "Bundle", "type": "transaction",
                                 "entry": [{"resource": observation()}]})
    assert status == 400
    assert first(body)["expression"] == ["Bundle.entry[0].request"]


def test_same_resource_twice_in_a_transaction_is_refused(client: TestClient) -> None:
    status, body = send(client, bundle("transaction", observation("A"), observation("A", value=131)))
    assert status == 400
    assert first(body)["code"] == "duplicate"


def test_unknown_route_answers_with_an_operation_outcome(client: TestClient) -> None:
    r = client.get("/fhir/Nope/1")
    assert r.status_code == 404
    assert first(r.json())["code"] in ("not-supported", "not-found")


@pytest.fixture
def zoned(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    ctx = build_context(Settings(data_dir=tmp_path, lab_timezone="Europe/Berlin", scheduler=False), clock=clock)
    with authorised_client(ctx) as c:
        yield c
    ctx.db.dispose()


def test_lab_timezone_setting_accepts_offsetless_times_with_a_warning(zoned: TestClient) -> None:
    r = zoned.post("/fhir/Observation", content=dumps(observation(effective="2026-03-02T08:00:00")),
                   headers={**HEADERS, "prefer": "return=OperationOutcome"})
    assert r.status_code == 201
    warning = r.json()["issue"][0]
    assert warning["severity"] == "warning"
    assert warning["expression"] == ["Observation.effectiveDateTime"]
    # Berlin is UTC+1 in March (before the last-Sunday switch to summer time): 08:00 local = 07:00Z.
    stored = zoned.get(r.headers["location"].removeprefix("http://testserver")).json()
    assert stored["effectiveDateTime"] == "2026-03-02T08:00:00+01:00"
