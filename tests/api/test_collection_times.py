"""Results collected in the future or before the look-back window: refused with the skew named, or
evaluated in their own window, never stored as "all ok" and then ignored.

The clock fixture stands at 2026-03-02T12:00Z; the look-back window is the default 72 h; the policy
keys are the defaults ([timing] future_tolerance_minutes = 5, late_note_after_minutes = 60).
"""

# Critical values used here (site-policy defaults, RCPath G158 2017; Kost 1990):
#   potassium <= 2.5 mmol/L critical low, >= 6.5 critical high; sodium <= 120 critical low.
# Sodium rising more than 10 mmol/L in 24 h from a nadir below 130 is too fast (Spasovski 2014).

from __future__ import annotations

from datetime import timedelta
from typing import Any

from fastapi.testclient import TestClient

from service.clock import FixedClock
from tests.factories import HEADERS, bundle, dumps, insulin, observation

POTASSIUM = "2823-3"


def post(client: TestClient, *resources: dict[str, Any], kind: str = "batch") -> Any:
    return client.post("/fhir", content=dumps(bundle(kind, *resources)), headers=HEADERS)


def entry_response(client: TestClient, resource: dict[str, Any]) -> dict[str, Any]:
    r = post(client, resource)
    assert r.status_code == 200, r.text
    return dict(r.json()["entry"][0]["response"])


def flags(client: TestClient, query: str = "") -> list[dict[str, Any]]:
    body = client.get(f"/fhir/Flag?_count=100{query}").json()
    return [e["resource"] for e in body.get("entry", []) if e["search"]["mode"] == "match"]


def stored_observations(client: TestClient) -> int:
    body = client.get("/fhir/Observation?patient=Patient/p1").json()
    return len([e for e in body.get("entry", []) if e["search"]["mode"] == "match"])


# -- the future ---------------------------------------------------------------------------------------


def test_a_result_collected_3_h_after_the_server_clock_is_refused_with_the_skew_named(client: TestClient) -> None:
    response = entry_response(client, observation("f1", value=118, effective="2026-03-02T15:10:00+00:00"))
    assert response["status"].startswith("422")
    (issue,) = response["outcome"]["issue"]
    assert issue["severity"] == "error"
    assert issue["expression"] == ["Bundle.entry[0].resource.effectiveDateTime"]
    assert "collected 3 h 10 min after the server's current time" in issue["diagnostics"]
    assert "tolerance 5 min" in issue["diagnostics"]
    assert "check the sender's clock or time zone (a local time labelled Z?)" in issue["diagnostics"]
    assert stored_observations(client) == 0


def test_a_single_create_collected_in_the_future_is_a_422_naming_the_effective_element(client: TestClient) -> None:
    obs = observation("f1", value=118)
    del obs["effectiveDateTime"]
    obs["effectivePeriod"] = {"start": "2026-03-02T15:10:00Z"}
    r = client.post("/fhir/Observation", content=dumps(obs), headers=HEADERS)
    assert r.status_code == 422, r.text
    (issue,) = r.json()["issue"]
    assert issue["expression"] == ["Observation.effectivePeriod.start"]
    assert "3 h 10 min after the server's current time" in issue["diagnostics"]


def test_a_transaction_with_one_future_result_stores_nothing(client: TestClient) -> None:
    r = post(client, observation("ok", value=139), observation("f1", value=118,
                                                                 effective="2026-03-03T12:00:00+00:00"),
             kind="transaction")
    assert r.status_code == 422, r.text
    (issue,) = r.json()["issue"]
    assert issue["expression"] == ["Bundle.entry[1].resource.effectiveDateTime"]
    assert "1 d after the server's current time" in issue["diagnostics"]
    assert stored_observations(client) == 0


def test_an_insulin_administration_starting_in_the_future_is_refused(client: TestClient) -> None:
    response = entry_response(client, insulin("m1", start="2026-03-02T15:10:00+00:00"))
    assert response["status"].startswith("422")
    (issue,) = response["outcome"]["issue"]
    assert issue["expression"] == ["Bundle.entry[0].resource.effectivePeriod.start"]
    assert "started 3 h 10 min after the server's current time; tolerance 5 min" in issue["diagnostics"]


def test_the_future_check_reads_the_injected_clock(client: TestClient, clock: FixedClock) -> None:
    clock.advance(timedelta(hours=4))  # now 16:00: 15:10 is in the past
    response = entry_response(client, observation("f1", value=139, effective="2026-03-02T15:10:00+00:00"))
    assert response["status"].startswith("201")


def test_a_critical_result_2_min_in_the_future_is_judged_as_now_and_raises_its_flag(client: TestClient) -> None:
    response = entry_response(client, observation("k1", code=POTASSIUM, value=6.9,
                                                  effective="2026-03-02T12:02:00+00:00"))
    assert response["status"].startswith("201")
    (flag,) = flags(client)
    assert flag["status"] == "active"
    assert flag["code"]["coding"][0]["code"] == "potassium-critical-high"
    assert flag["period"]["start"] == "2026-03-02T12:02:00Z"
