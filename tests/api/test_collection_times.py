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

import orjson
from fastapi.testclient import TestClient
from sqlalchemy import select

from service.api.context import AppContext
from service.clock import FixedClock
from service.db.tables import SubscriptionEvent
from service.notify.topics import FLAG_CHANGED
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


def test_a_future_period_end_read_for_want_of_a_start_time_is_the_element_named(client: TestClient) -> None:
    obs = observation("f1", value=118)
    del obs["effectiveDateTime"]
    obs["effectivePeriod"] = {"start": "2026-03-02", "end": "2026-03-02T15:10:00Z"}  # a start without a time
    r = client.post("/fhir/Observation", content=dumps(obs), headers=HEADERS)
    assert r.status_code == 422, r.text
    assert r.json()["issue"][0]["expression"] == ["Observation.effectivePeriod.end"]


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


# -- before the look-back window ----------------------------------------------------------------------


def late_potassium(client: TestClient, value: float = 2.3, ident: str = "k-late") -> dict[str, Any]:
    """A potassium collected 4 d 2 h before the clock (2026-02-26T10:00Z), arriving now."""
    return entry_response(client, observation(ident, code=POTASSIUM, value=value,
                                              effective="2026-02-26T10:00:00+00:00"))


def test_a_critical_result_4_d_old_raises_a_flag_that_says_it_arrived_late_and_by_how_much(
    client: TestClient,
) -> None:
    response = late_potassium(client)
    assert response["status"].startswith("201")
    (flag,) = flags(client, "&status=inactive")
    assert flag["code"]["coding"][0]["code"] == "potassium-critical-low"
    assert "2.3" in flag["code"]["text"]
    assert "arrived late, 4 d 2 h after collection" in flag["code"]["text"]
    # A record of a danger at the evidence's time: its period ends there (see README, Flags).
    assert flag["period"] == {"start": "2026-02-26T10:00:00Z", "end": "2026-02-26T10:00:00Z"}


def test_a_late_result_is_reported_as_evaluated_in_its_own_window(client: TestClient) -> None:
    response = late_potassium(client, value=4.2)
    messages = [i["diagnostics"] for i in response["outcome"]["issue"]]
    assert any("before the 72 h look-back window" in m and "evaluated in the 72 h ending at its collection" in m
               for m in messages), messages
    assert flags(client, "&status=inactive") == [] and flags(client) == []  # 4.2 mmol/L is not critical


def test_a_late_flag_is_announced_to_subscribers_as_a_new_flag(client: TestClient, context: AppContext) -> None:
    sub = {"resourceType": "Subscription", "status": "requested", "reason": "rapid-response paging",
           "criteria": FLAG_CHANGED,
           "channel": {"type": "rest-hook", "endpoint": "https://pager.example.org/hook",
                       "payload": "application/fhir+json"}}
    assert client.post("/fhir/Subscription", content=orjson.dumps(sub), headers=HEADERS).status_code == 201
    late_potassium(client)
    (flag,) = flags(client, "&status=inactive")
    with context.db.session() as session:
        rows = session.execute(select(SubscriptionEvent.focus_id, SubscriptionEvent.interaction)  # type: ignore[call-overload]
                               .where(SubscriptionEvent.kind == "event-notification")).all()
    assert [tuple(r) for r in rows] == [(flag["id"], "create")]


def test_a_late_flag_is_not_closed_by_the_next_current_evaluation(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    late_potassium(client)
    (before,) = flags(client, "&status=inactive")
    # A current, normal potassium and a time-driven pass re-evaluate the patient's current window.
    assert entry_response(client, observation("k-now", code=POTASSIUM, value=4.1))["status"].startswith("201")
    clock.advance(timedelta(hours=1))
    context.evaluator.recheck(context.db, clock.now())
    (after,) = flags(client, "&status=inactive")
    assert after["meta"]["versionId"] == before["meta"]["versionId"] == "1"
    assert after["code"]["text"] == before["code"]["text"]


def test_late_results_are_judged_with_the_results_of_their_own_window(client: TestClient) -> None:
    # Sodium 112 then 124 twenty hours later, both collected about 5 days ago: a rise of 12 in 20 h.
    r = post(client, observation("na-a", value=112, effective="2026-02-25T16:00:00+00:00"),
             observation("na-b", value=124, effective="2026-02-26T12:00:00+00:00"))
    assert r.status_code == 200, r.text
    codes = {f["code"]["coding"][0]["code"]: f for f in flags(client, "&status=inactive")}
    rise = codes["sodium-rise-too-fast"]
    assert "from 112 to 124" in rise["code"]["text"]
    assert "arrived late, 4 d after collection" in rise["code"]["text"]
    assert rise["period"]["end"] == "2026-02-26T12:00:00Z"


def test_a_late_correction_of_a_late_result_updates_its_late_flag(client: TestClient) -> None:
    late_potassium(client)
    corrected = observation("k-late", code=POTASSIUM, value=2.1, effective="2026-02-26T10:00:00+00:00",
                            status="corrected")
    assert entry_response(client, corrected)["status"].startswith("200")
    (flag,) = flags(client, "&status=inactive")
    assert flag["meta"]["versionId"] == "2" and "2.1" in flag["code"]["text"]


# -- late within the window ---------------------------------------------------------------------------


def test_a_flag_whose_newest_result_arrived_2_h_after_collection_notes_the_delay(client: TestClient) -> None:
    entry_response(client, observation("na1", value=118, effective="2026-03-02T10:00:00+00:00"))
    (flag,) = flags(client)
    assert flag["status"] == "active"
    assert flag["code"]["text"].endswith("; newest result arrived 2 h after collection.")


def test_a_flag_whose_newest_result_arrived_within_the_policy_delay_has_no_note(client: TestClient) -> None:
    entry_response(client, observation("na1", value=118, effective="2026-03-02T11:30:00+00:00"))
    (flag,) = flags(client)
    assert "arrived" not in flag["code"]["text"]


def test_a_late_result_entered_in_error_withdraws_its_late_flag(client: TestClient) -> None:
    late_potassium(client)
    withdrawn = observation("k-late", code=POTASSIUM, value=2.3, effective="2026-02-26T10:00:00+00:00",
                            status="entered-in-error")
    assert entry_response(client, withdrawn)["status"].startswith("200")
    (flag,) = flags(client, "&status=entered-in-error")
    assert flag["meta"]["versionId"] == "2" and flags(client, "&status=inactive") == []


def test_a_late_insulin_infusion_is_judged_in_the_window_ending_when_it_ended(client: TestClient) -> None:
    # Potassium below 3.5 mmol/L twice, an hour or more apart, during IV insulin (Umpierrez 2024, from
    # memory; site-policy default), about 5 days ago; the results and the infusion all arrive now.
    r = post(client, observation("k1", code=POTASSIUM, value=3.2, effective="2026-02-25T01:00:00+00:00"),
             observation("k2", code=POTASSIUM, value=3.1, effective="2026-02-25T03:00:00+00:00"),
             insulin("m1", start="2026-02-25T00:00:00+00:00", end="2026-02-25T06:00:00+00:00"))
    assert r.status_code == 200, r.text
    notes = [i["diagnostics"] for i in r.json()["entry"][2]["response"]["outcome"]["issue"]]
    assert any(n.startswith("ended 5 d 6 h before it arrived") for n in notes), notes
    (flag,) = flags(client, "&status=inactive&code=hypokalemia-on-insulin")
    assert "arrived late" in flag["code"]["text"]
    evidence = [e["valueReference"]["reference"] for e in flag["extension"] if e["url"].endswith("flag-detail")]
    assert any(ref.startswith("MedicationAdministration/") for ref in evidence)
