"""_include=Flag:detail adds only what the caller may read, and the searchset says what it left out.

Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017),
so it raises sodium-critical-low with that Observation as its evidence.
"""

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient
from fhir.resources.R4B.bundle import Bundle

from service.api.context import AppContext
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation

INCLUDE = "/fhir/Flag?_include=Flag:detail"


def raise_sodium_flag(client: TestClient) -> None:
    r = client.post("/fhir", content=dumps(bundle("batch", observation("na1", value=118))), headers=HEADERS)
    assert r.json()["entry"][0]["response"]["status"] == "201 Created"


def by_mode(body: dict[str, Any]) -> dict[str, list[dict[str, Any]]]:
    modes: dict[str, list[dict[str, Any]]] = {}
    for e in body["entry"]:
        modes.setdefault(e["search"]["mode"], []).append(e["resource"])
    return modes


def test_flag_only_token_gets_no_observations_through_include(client: TestClient, context: AppContext) -> None:
    raise_sodium_flag(client)
    with authorised_client(context, scope="system/Flag.rs", client="ward-dashboard") as dashboard:
        body = dashboard.get(INCLUDE).json()
    modes = by_mode(body)
    assert [f["resourceType"] for f in modes["match"]] == ["Flag"]
    assert "include" not in modes
    assert all(e["resource"]["resourceType"] != "Observation" for e in body["entry"])


def test_searchset_says_which_included_resources_were_left_out(client: TestClient, context: AppContext) -> None:
    raise_sodium_flag(client)
    with authorised_client(context, scope="system/Flag.rs", client="ward-dashboard") as dashboard:
        body = dashboard.get(INCLUDE).json()
    (outcome,) = by_mode(body)["outcome"]
    assert outcome["resourceType"] == "OperationOutcome"
    (issue,) = outcome["issue"]
    assert issue["severity"] == "warning" and issue["code"] == "suppressed"
    assert "1 Observation" in issue["diagnostics"] and "system/Observation.r" in issue["diagnostics"]
    Bundle.model_validate(body)


def test_token_that_may_read_observations_gets_them_included(client: TestClient, context: AppContext) -> None:
    raise_sodium_flag(client)
    with authorised_client(context, scope="system/Flag.rs system/Observation.r", client="ward-dashboard") as reader:
        body = reader.get(INCLUDE).json()
    modes = by_mode(body)
    assert [o["valueQuantity"]["value"] for o in modes["include"]] == [118]
    assert "outcome" not in modes
