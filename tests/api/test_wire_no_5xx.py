"""Inputs a fuzzer found answering 500: each is a 4xx naming the element, or is accepted; never a 5xx.

In a batch a bad entry gets its own 4xx entry response and the good entries beside it are still stored
and evaluated: a critical sodium next to a broken entry still raises its Flag.
"""

from __future__ import annotations

from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.api.context import AppContext
from tests.factories import HEADERS, bundle, dumps, insulin, observation


def post(client: TestClient, body: Any, path: str = "/fhir", **headers: str) -> Any:
    return client.post(path, content=body if isinstance(body, bytes) else dumps(body), headers=HEADERS | headers)


def entry_statuses(response: Any) -> list[int]:
    assert response.status_code == 200, response.text
    return [int(e["response"]["status"].split()[0]) for e in response.json()["entry"]]


def outcome_issue(body: dict[str, Any]) -> dict[str, Any]:
    assert body["resourceType"] == "OperationOutcome"
    return next(i for i in body["issue"] if i["severity"] in ("error", "fatal"))


def active_flag_codes(client: TestClient) -> list[str]:
    body = client.get("/fhir/Flag?_count=100&status=active").json()
    return sorted(e["resource"]["code"]["coding"][0]["code"] for e in body.get("entry", [])
                  if e["search"]["mode"] == "match")


def critical_sodium() -> dict[str, Any]:
    # Sodium <=120 mmol/L is critical (RCPath G158 2017).
    return observation("na-critical", value=118)


# -- Observation.code without a watched coding ------------------------------------------------------------


def test_observation_whose_code_has_only_text_is_acknowledged_not_a_500(client: TestClient) -> None:
    obs = observation("text-only") | {"code": {"text": "sodium"}}
    r = post(client, obs, "/fhir/Observation")
    assert r.status_code == 200, r.text
    assert "not stored" in outcome_issue_or_info(r.json())


def outcome_issue_or_info(body: dict[str, Any]) -> str:
    assert body["resourceType"] == "OperationOutcome"
    return " ".join(i.get("diagnostics", "") for i in body["issue"])


def test_batch_with_a_text_only_code_keeps_the_critical_sodium_and_its_flag(client: TestClient) -> None:
    r = post(client, bundle("batch", observation("text-only") | {"code": {"text": "sodium"}}, critical_sodium()))
    statuses = entry_statuses(r)
    assert statuses[0] < 300 and statuses[1] == 201
    assert active_flag_codes(client) == ["sodium-critical-low"]


def test_empty_code_is_refused_naming_observation_code(client: TestClient) -> None:
    r = post(client, bundle("batch", observation("empty-code") | {"code": {}}, critical_sodium()))
    statuses = entry_statuses(r)
    assert statuses[0] == 400 and statuses[1] == 201
    issue = outcome_issue(r.json()["entry"][0]["response"]["outcome"])
    assert issue["expression"] == ["Bundle.entry[0].resource.code"]
    assert active_flag_codes(client) == ["sodium-critical-low"]


# -- the same MedicationAdministration twice in one batch --------------------------------------------------


def test_batch_with_the_same_administration_in_progress_then_completed_stores_both_versions(
    client: TestClient,
) -> None:
    started = insulin("M-twice")
    completed = insulin("M-twice", status="completed", end="2026-03-02T07:00:00+00:00")
    r = post(client, bundle("batch", started, completed, critical_sodium()))
    assert entry_statuses(r) == [201, 200, 201]
    location = r.json()["entry"][1]["response"]["location"]
    assert location.endswith("/_history/2")
    assert client.get(f"/fhir/{location.split('/_history')[0]}").json()["status"] == "completed"
    assert "sodium-critical-low" in active_flag_codes(client)


def test_resending_that_batch_answers_the_same_way(client: TestClient) -> None:
    body = bundle("batch", insulin("M-again"), insulin("M-again", status="completed", end="2026-03-02T07:00:00+00:00"))
    entry_statuses(post(client, body))
    assert entry_statuses(post(client, body)) == [200, 200]  # stale, then unchanged: nothing new


# -- the Bundle envelope ---------------------------------------------------------------------------------


@pytest.mark.parametrize("value", [["Observation"], 1, {"a": 1}, True], ids=["list", "number", "object", "bool"])
@pytest.mark.parametrize("element", ["url", "method", "ifNoneExist"])
def test_entry_request_element_of_the_wrong_json_type_is_refused_in_its_own_slot(
    client: TestClient, element: str, value: Any
) -> None:
    body = bundle("batch", observation("bad-envelope"), critical_sodium())
    body["entry"][0]["request"][element] = value
    r = post(client, body)
    statuses = entry_statuses(r)
    assert statuses[0] == 400 and statuses[1] == 201
    issue = outcome_issue(r.json()["entry"][0]["response"]["outcome"])
    assert issue["expression"] == [f"Bundle.entry[0].request.{element}"]
    assert active_flag_codes(client) == ["sodium-critical-low"]


@pytest.mark.parametrize("value", [["urn:uuid:x"], 1, {"a": 1}, True], ids=["list", "number", "object", "bool"])
def test_full_url_of_the_wrong_json_type_is_refused_in_its_own_slot(client: TestClient, value: Any) -> None:
    body = bundle("batch", observation("bad-fullurl"), critical_sodium())
    body["entry"][0]["fullUrl"] = value
    r = post(client, body)
    statuses = entry_statuses(r)
    assert statuses[0] == 400 and statuses[1] == 201
    assert outcome_issue(r.json()["entry"][0]["response"]["outcome"])["expression"] == ["Bundle.entry[0].fullUrl"]


def test_entry_without_request_in_a_batch_fails_alone(client: TestClient) -> None:
    body = bundle("batch", observation("no-request"), critical_sodium())
    del body["entry"][0]["request"]
    statuses = entry_statuses(post(client, body))
    assert statuses[0] == 400 and statuses[1] == 201


def test_entry_that_is_not_an_object_fails_alone(client: TestClient) -> None:
    body = bundle("batch", critical_sodium())
    body["entry"].insert(0, "Observation")
    statuses = entry_statuses(post(client, body))
    assert statuses == [400, 201]


def test_patient_entry_whose_identifier_is_a_string_is_refused_in_its_own_slot(client: TestClient) -> None:
    body = bundle("batch", {"resourceType": "Patient", "identifier": "MRN-1"}, critical_sodium())
    body["entry"][0]["fullUrl"] = "urn:uuid:0c3151bd-1cbf-4d64-b04d-cd9187a4c6e0"
    r = post(client, body)
    statuses = entry_statuses(r)
    assert statuses[0] == 400 and statuses[1] == 201
    assert outcome_issue(r.json()["entry"][0]["response"]["outcome"])["expression"] == [
        "Bundle.entry[0].resource.identifier"]


@pytest.mark.parametrize("method", ["PATCH", "HEAD", "DELETE"])
def test_unsupported_request_method_is_named(client: TestClient, method: str) -> None:
    body = bundle("batch", observation("patch"))
    body["entry"][0]["request"]["method"] = method
    issue = outcome_issue(post(client, body).json()["entry"][0]["response"]["outcome"])
    assert method in issue["diagnostics"]
    assert issue["expression"] == ["Bundle.entry[0].request.method"]


def test_json_nested_300_deep_is_a_400(client: TestClient) -> None:
    # Under orjson's parse limit (1024) and over what it can serialise again (254).
    depth = 300
    raw = dumps(bundle("batch", observation("deep"))).replace(
        b'"status":"final"', b'"status":"final","_status":' + b'{"a":' * depth + b"1" + b"}" * depth)
    assert post(client, raw).status_code == 400


# -- dates ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("when", ["2016-12-31T23:59:60Z", "2016-12-31T23:59:60.5+00:00"])
def test_a_leap_second_is_accepted_and_ordered_before_the_next_second(client: TestClient, when: str) -> None:
    # FHIR R4 datatypes (instant, dateTime) allow seconds 60 for a leap second; RFC 3339 section 5.7.
    # 2016-12-31T23:59:60Z was a real one (IERS Bulletin C 52).
    obs = observation("leap", effective=when, value=140)
    r = post(client, obs, "/fhir/Observation")
    assert r.status_code == 201, r.text
    assert r.json()["effectiveDateTime"] == when  # served as sent


@pytest.mark.parametrize(
    ("element", "value"),
    [
        ("effectiveDateTime", "0001-01-01T00:00:00+14:00"),
        ("effectiveDateTime", "9999-12-31T23:59:59-14:00"),
        ("issued", "0001-01-01T00:00:00+14:00"),
        ("issued", "9999-12-31T23:59:59-14:00"),
    ],
)
def test_a_date_time_outside_the_representable_range_is_a_422_naming_the_element(
    client: TestClient, element: str, value: str
) -> None:
    obs = observation("overflow") | {element: value}
    r = post(client, bundle("batch", obs, critical_sodium()))
    statuses = entry_statuses(r)
    assert statuses == [422, 201]
    assert outcome_issue(r.json()["entry"][0]["response"]["outcome"])["expression"] == [
        f"Bundle.entry[0].resource.{element}"]


def test_an_administration_starting_in_year_one_with_an_eastern_offset_is_a_422(client: TestClient) -> None:
    r = post(client, insulin("M-ancient", start="0001-01-01T00:00:00+14:00"), "/fhir/MedicationAdministration")
    assert r.status_code == 422, r.text
    assert outcome_issue(r.json())["expression"] == ["MedicationAdministration.effectivePeriod.start"]


# -- numbers in query and path -----------------------------------------------------------------------------


@pytest.mark.parametrize("path", [
    "/fhir/Observation?_offset=99999999999999999999",
    "/fhir/Observation?_count=99999999999999999999&_offset=9223372036854775808",
    "/fhir/Flag?_offset=99999999999999999999",
])
def test_an_offset_above_two_to_the_63_is_a_400(client: TestClient, path: str) -> None:
    assert client.get(path).status_code == 400


@pytest.mark.parametrize("rtype", ["Observation", "Flag", "MedicationAdministration"])
def test_a_history_version_above_two_to_the_63_is_not_found(client: TestClient, rtype: str) -> None:
    assert client.get(f"/fhir/{rtype}/abc/_history/99999999999999999999").status_code == 404


@pytest.mark.parametrize("date", ["0001-01-01T00:00:00+14:00", "9999-12-31T23:59:59-14:00", "le9999-12-31"])
def test_a_search_date_outside_the_representable_range_is_a_400(client: TestClient, date: str) -> None:
    assert client.get("/fhir/Observation", params={"date": date}).status_code == 400


# -- the last resort ----------------------------------------------------------------------------------------


def test_an_unexpected_fault_answers_an_operation_outcome_without_raising_to_the_server(
    context: AppContext, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The server closes a kept-alive connection when the application raises after answering
    # (uvicorn does); the last resort answers and does not raise.
    from tests.conftest import authorised_client

    def broken(*_: Any, **__: Any) -> Any:
        raise RuntimeError("a server fault")

    with authorised_client(context) as c:
        monkeypatch.setattr(context.ingestor, "batch", broken)
        r = post(c, bundle("batch", observation("fault")))  # TestClient re-raises what reaches the server
    assert r.status_code == 500
    assert outcome_issue(r.json())["code"] == "exception"



@pytest.mark.parametrize("parameter", ["note", ["note"], [{"name": "note", "valueString": 5}]],
                         ids=["string", "list-of-strings", "number-note"])
def test_an_acknowledge_body_of_the_wrong_shape_is_a_400(client: TestClient, parameter: Any) -> None:
    body = {"resourceType": "Parameters", "parameter": parameter}
    r = client.post("/fhir/Flag/abc/$acknowledge", content=dumps(body), headers=HEADERS)
    assert r.status_code == 400, r.text
