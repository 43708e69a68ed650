"""Search as FHIR R4 defines it (http://hl7.org/fhir/R4/search.html), on Observation and Flag.

Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017), so
it raises a Flag to search. 2951-2 is LOINC "Sodium [Moles/volume] in Serum or Plasma" (loinc.org).
"""

from __future__ import annotations

from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.factories import HEADERS, LAB, LOINC, bundle, dumps, observation

SNOMED = "http://snomed.info/sct"


def send(client: TestClient, *resources: dict[str, Any]) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", *resources)), headers=HEADERS)
    assert r.status_code == 200, r.text


def matches(body: dict[str, Any]) -> list[dict[str, Any]]:
    return [e["resource"] for e in body.get("entry", []) if e["search"]["mode"] == "match"]


def outcome(body: dict[str, Any]) -> list[dict[str, Any]]:
    found = [e["resource"] for e in body.get("entry", []) if e["search"]["mode"] == "outcome"]
    return [i for o in found for i in o["issue"]]


def links(body: dict[str, Any]) -> dict[str, str]:
    return {link["relation"]: link["url"] for link in body["link"]}


@pytest.fixture
def three(client: TestClient) -> TestClient:
    send(client, observation("a", value=140, effective="2026-03-02T08:00:00+00:00"),
         observation("b", value=141, effective="2026-03-02T09:00:00+00:00"),
         observation("c", value=142, effective="2026-03-02T10:00:00+00:00", status="preliminary"))
    return client


# search.html#token: [system]|[code] matches the code only in that system.
def test_a_code_in_another_system_does_not_match_the_loinc_code(three: TestClient) -> None:
    body = three.get(f"/fhir/Observation?code={SNOMED}|2951-2").json()
    assert (body["total"], matches(body)) == (0, [])


def test_a_code_with_the_loinc_system_matches(three: TestClient) -> None:
    assert three.get(f"/fhir/Observation?code={LOINC}|2951-2").json()["total"] == 3


# search.html#token: |[code] matches only codings without a system; every code held here has one.
def test_a_code_explicitly_without_a_system_matches_nothing(three: TestClient) -> None:
    assert three.get("/fhir/Observation?code=|2951-2").json()["total"] == 0


# search.html#token: repeated parameters are AND, commas are OR.
def test_repeated_code_parameters_are_anded(three: TestClient) -> None:
    assert three.get("/fhir/Observation?code=2951-2&code=2823-3").json()["total"] == 0
    assert three.get("/fhir/Observation?code=2951-2,2823-3").json()["total"] == 3


def test_identifier_finds_the_result_by_its_business_identifier(three: TestClient) -> None:
    (found,) = matches(three.get(f"/fhir/Observation?identifier={LAB}|b").json())
    assert found["identifier"][0]["value"] == "b"


def test_identifier_in_another_system_matches_nothing(three: TestClient) -> None:
    assert three.get("/fhir/Observation?identifier=https://other.example.org|b").json()["total"] == 0


def test_id_finds_that_resource(three: TestClient) -> None:
    rid = matches(three.get(f"/fhir/Observation?identifier={LAB}|a").json())[0]["id"]
    (found,) = matches(three.get(f"/fhir/Observation?_id={rid}").json())
    assert found["id"] == rid


def test_status_filters_on_the_observation_status(three: TestClient) -> None:
    (found,) = matches(three.get("/fhir/Observation?status=preliminary").json())
    assert found["identifier"][0]["value"] == "c"


def test_an_observation_status_that_fhir_does_not_define_is_a_400(three: TestClient) -> None:
    r = three.get("/fhir/Observation?status=finished")
    assert r.status_code == 400
    assert "status" in r.text


def test_last_updated_bounds_when_the_version_was_written(three: TestClient) -> None:
    # The clock fixture stands at 2026-03-02T12:00Z for every write.
    assert three.get("/fhir/Observation?_lastUpdated=ge2026-03-02").json()["total"] == 3
    assert three.get("/fhir/Observation?_lastUpdated=lt2026-03-02").json()["total"] == 0


# search.html#count: _count=0 asks for the count only, no entries.
def test_count_zero_answers_the_total_without_entries(three: TestClient) -> None:
    body = three.get("/fhir/Observation?_count=0").json()
    assert (body["total"], matches(body)) == (3, [])


# search.html#summary: _summary=count returns the total only.
def test_summary_count_answers_the_total_without_entries(three: TestClient) -> None:
    body = three.get("/fhir/Observation?_summary=count").json()
    assert (body["total"], matches(body)) == (3, [])


# search.html#total: _total=none lets the server leave the total out.
def test_total_none_leaves_the_total_out(three: TestClient) -> None:
    body = three.get("/fhir/Observation?_total=none").json()
    assert "total" not in body and len(matches(body)) == 3


# http.html#paging: first, previous, next and last links.
def test_a_middle_page_links_first_previous_next_and_last(three: TestClient) -> None:
    page = three.get("/fhir/Observation?_count=1&_offset=1").json()
    rel = links(page)
    assert set(rel) == {"self", "first", "previous", "next", "last"}
    assert "_offset=0" in rel["first"] and "_offset=0" in rel["previous"]
    assert "_offset=2" in rel["next"] and "_offset=2" in rel["last"]


def test_the_first_page_has_no_previous_link(three: TestClient) -> None:
    rel = links(three.get("/fhir/Observation?_count=2").json())
    assert "previous" not in rel and "next" in rel


def test_following_next_links_visits_every_result_once(three: TestClient) -> None:
    seen: list[str] = []
    url: str | None = "/fhir/Observation?_count=2"
    while url:
        body = three.get(url.replace("http://testserver", "")).json()
        seen += [r["id"] for r in matches(body)]
        url = links(body).get("next")
    assert len(seen) == len(set(seen)) == 3


# search.html#errors: lenient by default; an unknown parameter is ignored and said so in an OperationOutcome
# entry (search.mode = outcome), and left out of the self link.
def test_an_unknown_parameter_is_ignored_with_a_warning(three: TestClient) -> None:
    r = three.get("/fhir/Observation?performer=Practitioner/x")
    assert r.status_code == 200
    body = r.json()
    assert body["total"] == 3
    (issue,) = outcome(body)
    assert issue["severity"] == "warning" and "performer" in issue["diagnostics"]
    assert "performer" not in links(body)["self"]


def test_an_unsupported_modifier_is_ignored_with_a_warning(three: TestClient) -> None:
    body = three.get("/fhir/Observation?code:text=sodium").json()
    assert body["total"] == 3 and "code:text" in outcome(body)[0]["diagnostics"]


# search.html#errors: Prefer: handling=strict makes an unknown parameter an error.
def test_an_unknown_parameter_is_a_400_under_strict_handling(three: TestClient) -> None:
    r = three.get("/fhir/Observation?performer=Practitioner/x", headers={"Prefer": "handling=strict"})
    assert r.status_code == 400
    assert r.json()["resourceType"] == "OperationOutcome" and "performer" in r.text


def test_the_flag_search_is_lenient_too(client: TestClient) -> None:
    body = client.get("/fhir/Flag?category=clinical").json()
    assert body["resourceType"] == "Bundle" and "category" in outcome(body)[0]["diagnostics"]


# ------------------------------------------------------------------------------------- Flag values


@pytest.mark.parametrize("query", ["status=open", "priority=urgent", "code=sodium-low"])
def test_a_flag_search_value_that_means_nothing_is_a_400(client: TestClient, query: str) -> None:
    r = client.get(f"/fhir/Flag?{query}")
    assert r.status_code == 400, r.text
    assert query.split("=")[0] in r.json()["issue"][0]["diagnostics"]


def test_a_flag_code_in_the_rule_system_matches(client: TestClient) -> None:
    send(client, observation("na", value=118))
    rule_system = "https://lytestream.example/fhir/CodeSystem/rule"
    assert client.get(f"/fhir/Flag?code={rule_system}|sodium-critical-low").json()["total"] == 1
    assert client.get(f"/fhir/Flag?code={SNOMED}|sodium-critical-low").json()["total"] == 0


def test_a_flag_priority_in_the_flag_priority_system_matches(client: TestClient) -> None:
    send(client, observation("na", value=118))
    # The codes of the R4 flag-priority extension: http://hl7.org/fhir/flag-priority-code (PH = high).
    assert client.get("/fhir/Flag?priority=http://hl7.org/fhir/flag-priority-code|PH").json()["total"] == 1


def test_flag_count_zero_answers_the_total(client: TestClient) -> None:
    send(client, observation("na", value=118))
    body = client.get("/fhir/Flag?_count=0").json()
    assert (body["total"], matches(body)) == (1, [])
