"""Resource limits at the edge: string length, JSON size, body size; each refusal is an OperationOutcome."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.clock import FixedClock
from service.config import Settings
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation

# FHIR R4 string datatype: string.value has maxLength 1048576 ("strings SHALL NOT exceed 1MB"),
# https://hl7.org/fhir/R4/datatypes.html#string and the string StructureDefinition.
FHIR_STRING_LIMIT = 1024 * 1024


def small_limits(tmp_path: Path, clock: FixedClock, **limits: Any) -> Iterator[TestClient]:
    ctx = build_context(Settings(data_dir=tmp_path, scheduler=False, **limits), clock=clock)
    with authorised_client(ctx) as c:
        yield c
    ctx.db.dispose()


@pytest.fixture
def short_strings(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from small_limits(tmp_path, clock, max_string_chars=100)


def issue_of(outcome: dict[str, Any]) -> dict[str, Any]:
    assert outcome["resourceType"] == "OperationOutcome"
    (issue,) = [i for i in outcome["issue"] if i["severity"] in ("error", "fatal")]
    return issue


def long_identifier(ident: str, chars: int) -> dict[str, Any]:
    obs = observation(ident)
    obs["identifier"].append({"system": "https://lab.example.org/other", "value": "9" * chars})
    return obs


def test_the_default_string_limit_is_fhirs_one_mebibyte(client: TestClient) -> None:
    body = long_identifier("R1", FHIR_STRING_LIMIT + 1)
    r = client.post("/fhir/Observation", content=dumps(body), headers=HEADERS)
    assert r.status_code == 422
    issue = issue_of(r.json())
    assert issue["code"] == "too-long"
    assert issue["expression"] == ["Observation.identifier[1].value"]
    assert client.get("/fhir/Observation").json()["total"] == 0


def test_a_string_at_the_limit_is_accepted(short_strings: TestClient) -> None:
    r = short_strings.post("/fhir/Observation", content=dumps(long_identifier("R1", 100)), headers=HEADERS)
    assert r.status_code == 201


def test_an_overlong_string_is_refused_with_its_fhirpath_and_not_echoed(short_strings: TestClient) -> None:
    r = short_strings.post("/fhir/Observation", content=dumps(long_identifier("R1", 101)), headers=HEADERS)
    assert r.status_code == 422
    issue = issue_of(r.json())
    assert issue["expression"] == ["Observation.identifier[1].value"]
    assert "101" in issue["diagnostics"] and "100" in issue["diagnostics"]
    assert "9" * 101 not in r.text


def test_an_overlong_string_refuses_the_whole_transaction(short_strings: TestClient) -> None:
    r = short_strings.post("/fhir", content=dumps(bundle("transaction", observation("ok"),
                                                          long_identifier("R2", 500))), headers=HEADERS)
    assert r.status_code == 422
    assert issue_of(r.json())["expression"] == ["Bundle.entry[1].resource.identifier[1].value"]
    assert short_strings.get("/fhir/Observation").json()["total"] == 0


def test_an_overlong_string_refuses_only_its_entry_in_a_batch(short_strings: TestClient) -> None:
    r = short_strings.post("/fhir", content=dumps(bundle("batch", observation("ok"), long_identifier("R2", 500))),
                           headers=HEADERS)
    assert r.status_code == 200
    good, bad = r.json()["entry"]
    assert good["response"]["status"].startswith("201")
    assert bad["response"]["status"].startswith("422")
    assert issue_of(bad["response"]["outcome"])["expression"] == ["Bundle.entry[1].resource.identifier[1].value"]


def test_an_overlong_string_in_an_unwatched_resource_is_refused_too(short_strings: TestClient) -> None:
    # Triage drops unwatched results without validating them; the length limit still holds for them.
    r = short_strings.post("/fhir", content=dumps(bundle("batch", long_identifier("R2", 500) | {
        "code": {"coding": [{"system": "http://loinc.org", "code": "2075-0"}]}})), headers=HEADERS)
    (entry,) = r.json()["entry"]
    assert entry["response"]["status"].startswith("422")


def test_an_overlong_string_outside_the_resources_refuses_the_request(short_strings: TestClient) -> None:
    body = bundle("batch", observation("ok"))
    body["entry"][0]["fullUrl"] = "urn:uuid:" + "0" * 200
    r = short_strings.post("/fhir", content=dumps(body), headers=HEADERS)
    assert r.status_code == 422
    assert issue_of(r.json())["expression"] == ["Bundle.entry[0].fullUrl"]


def test_an_overlong_element_name_is_refused_without_echoing_it(short_strings: TestClient) -> None:
    body = observation("R1") | {"x" * 300: True}
    r = short_strings.post("/fhir/Observation", content=dumps(body), headers=HEADERS)
    assert r.status_code == 422
    assert "x" * 300 not in r.text
    assert issue_of(r.json())["code"] == "too-long"


def test_the_string_limit_cannot_be_set_above_fhirs() -> None:
    with pytest.raises(ValueError, match="max_string_chars"):
        Settings(max_string_chars=FHIR_STRING_LIMIT + 1)


@pytest.fixture
def few_values(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from small_limits(tmp_path, clock, max_json_values=200)


def test_a_request_with_more_json_values_than_the_limit_is_413(few_values: TestClient) -> None:
    obs = observation("R1", interpretation=[{"text": "normal"}] * 100)  # 201 values on top of the result's
    r = few_values.post("/fhir/Observation", content=dumps(obs), headers=HEADERS)
    assert r.status_code == 413
    issue = issue_of(r.json())
    assert issue["code"] == "too-costly" and "200" in issue["diagnostics"]


def test_commas_and_brackets_inside_strings_are_not_counted_as_values(few_values: TestClient) -> None:
    obs = observation("R1", note=[{"text": "{[,]} " * 400}])
    r = few_values.post("/fhir/Observation", content=dumps(obs), headers=HEADERS)
    assert r.status_code == 201


def test_a_full_bundle_of_lab_results_is_within_the_default_value_limit(client: TestClient) -> None:
    body = bundle("batch", *[observation(f"R{i}", patient=f"Patient/p{i % 20}") for i in range(1000)])
    r = client.post("/fhir", content=dumps(body), headers=HEADERS)
    assert r.status_code == 200


@pytest.fixture
def small_bodies(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from small_limits(tmp_path, clock, max_body_bytes=2000)


def chunks(total: int) -> Iterator[bytes]:
    """A body sent chunked, without Content-Length: only counting it as it arrives can refuse it."""
    sent = 0
    while sent < total:
        yield b" " * 500
        sent += 500


def test_a_chunked_body_over_the_limit_is_413_on_every_route(small_bodies: TestClient) -> None:
    r = small_bodies.post("/fhir/Flag/any/$acknowledge", content=chunks(3000), headers=HEADERS)
    assert r.status_code == 413
    assert issue_of(r.json())["code"] == "too-costly"
    assert r.headers["connection"] == "close"


def test_a_chunked_bundle_over_the_limit_is_413(small_bodies: TestClient) -> None:
    r = small_bodies.post("/fhir", content=chunks(3000), headers=HEADERS)
    assert r.status_code == 413


def nested_extensions(levels: int) -> bytes:
    """An Observation whose extension holds an extension ... ``levels`` deep (two JSON levels each)."""
    inner = b'[{"url": "https://lab.example.org/x", "valueString": "a"}]'
    nested = b'[{"url": "https://lab.example.org/x", "extension": ' * levels + inner + b"}]" * levels
    return dumps(observation("R1"))[:-1] + b', "extension": ' + nested + b"}"


def test_json_nested_deeper_than_the_serialiser_takes_is_a_400(client: TestClient) -> None:
    deep = dumps(observation("R1"))[:-1] + b', "extension": ' + b"[" * 300 + b"]" * 300 + b"}"
    r = client.post("/fhir/Observation", content=deep, headers=HEADERS)
    assert r.status_code == 400
    assert "nested" in issue_of(r.json())["diagnostics"]


def test_extensions_nested_too_deep_to_validate_are_a_400_not_a_crash(client: TestClient) -> None:
    r = client.post("/fhir/Observation", content=nested_extensions(125), headers=HEADERS)  # 253 JSON levels
    assert r.status_code == 400
    assert issue_of(r.json())["code"] == "structure"


def test_extensions_nested_a_few_levels_are_fine(client: TestClient) -> None:
    r = client.post("/fhir/Observation", content=nested_extensions(3), headers=HEADERS)
    assert r.status_code == 201
