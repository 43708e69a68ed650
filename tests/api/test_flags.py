"""Flags through the API: raised, updated, closed and withdrawn by what the data say."""

from __future__ import annotations

from datetime import timedelta
from typing import Any

from fastapi.testclient import TestClient
from fhir.resources.R4B.flag import Flag

from service.api.context import AppContext
from service.clock import FixedClock
from service.fhir.flag_render import EVALUATION_URL, FLAG_DETAIL_URL
from tests.factories import HEADERS, bundle, dumps, insulin, observation


def send(client: TestClient, *resources: dict[str, Any], kind: str = "batch") -> None:
    r = client.post("/fhir", content=dumps(bundle(kind, *resources)), headers=HEADERS)
    assert r.status_code == 200, r.text
    assert all(e["response"]["status"].startswith("20") for e in r.json()["entry"]), r.text


def flags(client: TestClient, query: str = "") -> list[dict[str, Any]]:
    body = client.get(f"/fhir/Flag?_count=100{query}").json()
    return [e["resource"] for e in body["entry"] if e["search"]["mode"] == "match"]


def rules(client: TestClient, status: str = "active") -> list[str]:
    return sorted(f["code"]["coding"][0]["code"] for f in flags(client, f"&status={status}"))


def test_critical_low_sodium_raises_one_high_priority_flag(client: TestClient) -> None:
    # Sodium <=120 mmol/L is critical (RCPath G158 2017).
    send(client, observation("na1", value=118))
    (flag,) = flags(client)
    Flag.model_validate(flag)
    assert flag["status"] == "active"
    assert flag["code"]["coding"][0]["code"] == "sodium-critical-low"
    assert "118" in flag["code"]["text"]
    priority = next(e for e in flag["extension"] if e["url"].endswith("flag-priority"))
    assert priority["valueCodeableConcept"]["coding"][0]["code"] == "PH"
    assert flag["subject"] == {"reference": "Patient/p1"}


def test_flag_cites_the_version_of_its_evidence_and_the_policy_hash(client: TestClient, context: AppContext) -> None:
    send(client, observation("na1", value=118))
    (flag,) = flags(client)
    details = [e["valueReference"]["reference"] for e in flag["extension"] if e["url"] == FLAG_DETAIL_URL]
    assert len(details) == 1 and details[0].endswith("/_history/1")
    evaluation = next(e for e in flag["extension"] if e["url"] == EVALUATION_URL)["extension"]
    assert {"url": "policyHash", "valueString": context.evaluator.policy_hash} in evaluation


def test_resend_does_not_raise_a_second_flag_or_version(client: TestClient) -> None:
    send(client, observation("na1", value=118))
    send(client, observation("na1", value=118))
    (flag,) = flags(client)
    assert flag["meta"]["versionId"] == "1"


def test_correction_that_removes_the_danger_closes_the_flag(client: TestClient) -> None:
    send(client, observation("na1", value=118))
    send(client, observation("na1", value=138, status="corrected"))
    assert rules(client) == []
    (closed,) = flags(client, "&status=inactive")
    assert closed["period"]["end"]
    assert closed["meta"]["versionId"] == "2"


def test_entered_in_error_withdraws_the_flag_that_rested_on_it(client: TestClient) -> None:
    send(client, observation("k1", code="2823-3", value=6.9))
    send(client, observation("k1", code="2823-3", value=6.9, status="entered-in-error"))
    assert rules(client, "entered-in-error") == ["potassium-critical-high"]
    assert rules(client) == []


def test_newer_result_back_inside_limits_clears_the_flag(client: TestClient) -> None:
    send(client, observation("k1", code="2823-3", value=2.3, effective="2026-03-02T06:00:00+00:00"))
    assert rules(client) == ["potassium-critical-low"]
    send(client, observation("k2", code="2823-3", value=3.9, effective="2026-03-02T09:00:00+00:00"))
    assert rules(client) == []


def test_late_older_result_does_not_reopen_a_cleared_flag(client: TestClient) -> None:
    send(client, observation("k2", code="2823-3", value=3.9, effective="2026-03-02T09:00:00+00:00"))
    send(client, observation("k1", code="2823-3", value=2.3, effective="2026-03-02T06:00:00+00:00"))
    assert rules(client) == []


def test_urine_sodium_never_raises_a_serum_flag(client: TestClient) -> None:
    # 2955-3 Sodium [Moles/volume] in Urine (LOINC; VSAC value-set expansion of the sodium lab tests): 10 mmol/L is ordinary in urine.
    send(client, observation("u1", code="2955-3", value=10))
    assert flags(client) == []


def test_sodium_rising_too_fast_is_flagged_with_its_numbers(client: TestClient) -> None:
    # Rise above 10 mmol/L in 24 h from a nadir below 130 (Spasovski G et al, Eur J Endocrinol 2014;170:G1-G47, from memory).
    send(client, observation("n0", value=112, effective="2026-03-01T16:00:00+00:00"),
         observation("n1", value=118, effective="2026-03-01T22:00:00+00:00"),
         observation("n2", value=123, effective="2026-03-02T08:00:00+00:00"))
    assert "sodium-rise-too-fast" in rules(client)
    flag = next(f for f in flags(client) if f["code"]["coding"][0]["code"] == "sodium-rise-too-fast")
    assert "112" in flag["code"]["text"] and "123" in flag["code"]["text"]
    details = [e for e in flag["extension"] if e["url"] == FLAG_DETAIL_URL]
    assert len(details) >= 2


def test_new_evidence_makes_a_new_version_of_the_same_flag(client: TestClient) -> None:
    send(client, observation("n0", value=112, effective="2026-03-01T16:00:00+00:00"),
         observation("n2", value=123, effective="2026-03-02T08:00:00+00:00"))
    first = {f["id"]: f for f in flags(client) if f["code"]["coding"][0]["code"] == "sodium-rise-too-fast"}
    send(client, observation("n3", value=125, effective="2026-03-02T10:00:00+00:00"))
    after = {f["id"]: f for f in flags(client) if f["code"]["coding"][0]["code"] == "sodium-rise-too-fast"}
    assert after.keys() == first.keys()
    (flag,) = after.values()
    assert int(flag["meta"]["versionId"]) == 2
    history = client.get(f"/fhir/Flag/{flag['id']}/_history").json()
    assert history["total"] == 2


def test_hypokalemia_during_insulin_is_raised_at_once_and_the_recheck_job_raises_its_priority(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    # K 3.4 < 3.5 during an IV insulin infusion (Umpierrez GE et al, Diabetes Care 2024;47:1257-1275
    # [from memory]): medium at once; no newer K within 2 h (JBDS DKA recheck 2-hourly [from memory])
    # raises it to high by time alone.
    send(client, insulin("m1", start="2026-03-02T09:00:00+00:00"),
         observation("k1", code="2823-3", value=3.4, effective="2026-03-02T11:00:00+00:00"))
    (flag,) = [f for f in flags(client) if f["code"]["coding"][0]["code"] == "hypokalemia-on-insulin"]
    assert flag["extension"][0]["valueCodeableConcept"]["coding"][0]["code"] == "PM"
    clock.advance(timedelta(hours=1, minutes=30))  # 13:30: 2.5 h since the last potassium
    assert context.evaluator.recheck(context.db, clock.now()) >= 1
    (flag,) = [f for f in flags(client) if f["code"]["coding"][0]["code"] == "hypokalemia-on-insulin"]
    assert flag["extension"][0]["valueCodeableConcept"]["coding"][0]["code"] == "PH"
    assert context.evaluator.recheck(context.db, clock.now()) == 0  # a second run changes nothing


def test_an_infusion_stopped_without_an_end_time_ends_when_that_status_arrives(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    # K 3.4 < 3.5 during IV insulin (Umpierrez 2024 [from memory]); the IV tail of 60 min is common
    # practice, no source. A "stopped" infusion with no effectivePeriod.end must not run forever.
    send(client, insulin("m1", start="2026-03-02T09:00:00+00:00"),
         observation("k1", code="2823-3", value=3.4, effective="2026-03-02T11:00:00+00:00"))
    assert "hypokalemia-on-insulin" in rules(client)
    send(client, insulin("m1", start="2026-03-02T09:00:00+00:00", status="stopped"))  # arrives at 12:00
    clock.advance(timedelta(minutes=59))
    context.evaluator.recheck(context.db, clock.now())
    assert "hypokalemia-on-insulin" in rules(client)  # inside the tail
    clock.advance(timedelta(minutes=2))
    context.evaluator.recheck(context.db, clock.now())
    assert "hypokalemia-on-insulin" not in rules(client)


def test_insulin_started_on_a_potassium_below_the_hold_threshold_is_flagged_high_at_once(
    client: TestClient,
) -> None:
    # K 3.1 < 3.3: guidelines advise holding insulin (Kitabchi 2009); the infusion starts 30 min later,
    # coded with the HL7 v2 route IV and carrying a rate.
    send(client, observation("k1", code="2823-3", value=3.1, effective="2026-03-02T11:00:00+00:00"))
    assert "hypokalemia-on-insulin" not in rules(client)
    drip = insulin("m1", start="2026-03-02T11:30:00+00:00") | {"dosage": {
        "route": {"coding": [{"system": "http://terminology.hl7.org/CodeSystem/v2-0162", "code": "IV"}]},
        "rateQuantity": {"value": 6, "system": "http://unitsofmeasure.org", "code": "[iU]/h"}}}
    send(client, drip)
    (flag,) = [f for f in flags(client) if f["code"]["coding"][0]["code"] == "hypokalemia-on-insulin"]
    assert flag["extension"][0]["valueCodeableConcept"]["coding"][0]["code"] == "PH"
    assert "guidelines advise holding insulin until potassium is at least 3.3 mmol/L" in flag["code"]["text"]
    details = [e["valueReference"]["reference"] for e in flag["extension"]
               if e["url"].endswith("flag-detail")]
    assert any(d.startswith("Observation/") for d in details)
    assert any(d.startswith("MedicationAdministration/") for d in details)


def test_flag_search_filters_and_includes_evidence(client: TestClient) -> None:
    send(client, observation("na1", value=118),
         observation("k1", code="2823-3", value=6.9, patient="Patient/p2"))
    assert len(flags(client, "&patient=Patient/p2")) == 1
    assert len(flags(client, "&code=sodium-critical-low")) == 1
    assert len(flags(client, "&priority=PH")) == 2
    assert flags(client, "&patient=Patient/nobody") == []
    body = client.get("/fhir/Flag?patient=Patient/p1&_include=Flag:detail").json()
    modes = sorted(e["search"]["mode"] for e in body["entry"])
    assert modes == ["include", "match"]
    included = next(e["resource"] for e in body["entry"] if e["search"]["mode"] == "include")
    assert included["resourceType"] == "Observation" and included["valueQuantity"]["value"] == 118


def test_flag_read_and_vread(client: TestClient) -> None:
    send(client, observation("na1", value=118))
    send(client, observation("na1", value=138, status="corrected"))
    (flag,) = flags(client, "&status=inactive")
    assert client.get(f"/fhir/Flag/{flag['id']}/_history/1").json()["status"] == "active"
    assert client.get(f"/fhir/Flag/{flag['id']}").json()["status"] == "inactive"


def test_flag_search_ignores_an_unknown_include_with_a_warning(client: TestClient) -> None:
    # R4 search.html#errors: lenient unless Prefer: handling=strict.
    r = client.get("/fhir/Flag?_include=Flag:subject")
    assert r.status_code == 200
    (outcome,) = [e["resource"] for e in r.json()["entry"] if e["search"]["mode"] == "outcome"]
    assert "Flag:subject" in outcome["issue"][0]["diagnostics"]


def test_flag_search_refuses_an_unknown_include_under_strict_handling(client: TestClient) -> None:
    r = client.get("/fhir/Flag?_include=Flag:subject", headers={"Prefer": "handling=strict"})
    assert r.status_code == 400


def test_late_earlier_result_continues_the_open_flag_instead_of_reopening(client: TestClient) -> None:
    # A rise above 10 mmol/L in 24 h from a nadir below 130 (Spasovski G et al, Eur J Endocrinol 2014;170:G1-G47, from memory);
    # a late result that already showed the rise earlier moves the episode's start, not the flag.
    send(client, observation("n1", value=114, effective="2026-03-01T20:00:00+00:00"),
         observation("n2", value=126, effective="2026-03-02T10:00:00+00:00"))
    (before,) = [f for f in flags(client) if f["code"]["coding"][0]["code"] == "sodium-rise-too-fast"]
    send(client, observation("late", value=125, effective="2026-03-02T08:00:00+00:00"))
    rises = [f for f in flags(client, "&status=active,inactive")
             if f["code"]["coding"][0]["code"] == "sodium-rise-too-fast"]
    assert [f["id"] for f in rises] == [before["id"]]
    assert rises[0]["status"] == "active" and rises[0]["meta"]["versionId"] == "2"
    assert rises[0]["period"]["start"] < before["period"]["start"]
