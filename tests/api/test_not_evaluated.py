"""A stored watched result that no rule can read is answered 2xx with an outcome that says so and why."""

from __future__ import annotations

from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.factories import HEADERS, bundle, dumps, insulin, observation


def outcome_of(client: TestClient, resource: dict[str, Any]) -> tuple[str, list[dict[str, Any]]]:
    r = client.post("/fhir", content=dumps(bundle("batch", resource)), headers=HEADERS)
    assert r.status_code == 200, r.text
    response = r.json()["entry"][0]["response"]
    return response["status"], response.get("outcome", {}).get("issue", [])


def not_evaluated(issues: list[dict[str, Any]]) -> list[dict[str, Any]]:
    return [i for i in issues if i["diagnostics"].startswith("stored but not evaluated")]


def test_a_result_with_no_value_is_stored_and_the_outcome_says_it_was_not_evaluated_and_why(
    client: TestClient,
) -> None:
    status, issues = outcome_of(client, observation("na1", value=None))
    assert status.startswith("201")
    (issue,) = not_evaluated(issues)
    assert issue["severity"] == "warning"
    assert issue["code"] == "informational"
    assert "no numeric value" in issue["diagnostics"]
    assert issue["expression"] == ["Bundle.entry[0].resource"]


@pytest.mark.parametrize(("resource", "reason"), [
    (observation("r1", value=None, status="registered"), "status registered"),
    (observation("r2", value=None, status="cancelled"), "status cancelled"),
    (observation("r3", code="2955-3", value=40), "urine"),            # sodium in urine
    (observation("r4", code="18182-6", value=290, unit="mosm/kg"), "calculated"),  # osmolality by calculation
    (observation("r5", code="22664-7", value=5.1), "no rule reads urea"),
    (observation("r6", value=130, status="entered-in-error"), "entered in error"),
], ids=["registered", "cancelled", "urine", "calculated", "urea", "entered-in-error"])
def test_each_result_no_rule_can_read_is_reported_with_its_reason(
    client: TestClient, resource: dict[str, Any], reason: str
) -> None:
    status, issues = outcome_of(client, resource)
    assert status.startswith("201")
    (issue,) = not_evaluated(issues)
    assert issue["severity"] in ("information", "warning")
    assert reason in issue["diagnostics"]


def test_a_result_the_rules_read_has_no_such_note(client: TestClient) -> None:
    status, issues = outcome_of(client, observation("na1", value=139))
    assert status.startswith("201")
    assert not_evaluated(issues) == []


def test_a_subcutaneous_insulin_dose_the_policy_does_not_count_is_reported(client: TestClient) -> None:
    # Default policy counts intravenous insulin only (insulin_potassium.routes); 34206005 is subcutaneous.
    status, issues = outcome_of(client, insulin("m1", route_code="34206005"))
    assert status.startswith("201")
    (issue,) = not_evaluated(issues)
    assert "route subcutaneous" in issue["diagnostics"]
