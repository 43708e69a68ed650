"""Readable alerts: each Flag version's sentence says what happened (raised, worse, better, resolved,
withdrawn), when the result was collected in the lab's zone (UTC, said so, when no zone is set), the
previous value, and the rule's display from our rule CodeSystem.

Clinical values, with their sources:
- Sodium at or below 120 mmol/L is critical low (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707):
  118, 116 and 119 are all below it; 138 is inside the reference interval (135-145 mmol/L, common
  practice, no source).
- Potassium at or above 6.5 mmol/L is critical high (RCPath G158 2017): 7.1 is above it.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service.clock import FixedClock
from service.config import Settings
from service.domain.findings import Rule
from service.main import build_context
from tests.api.test_paging import send, sodium
from tests.conftest import authorised_client
from tests.factories import observation


def history(client: TestClient) -> list[dict[str, Any]]:
    """Every version of the one Flag, oldest first."""
    (entry,) = client.get("/fhir/Flag?status=active,inactive,entered-in-error").json()["entry"]
    flag_id = entry["resource"]["id"]
    body = client.get(f"/fhir/Flag/{flag_id}/_history").json()
    return sorted((e["resource"] for e in body["entry"]), key=lambda f: int(f["meta"]["versionId"]))


def texts(client: TestClient) -> list[str]:
    return [f["code"]["text"] for f in history(client)]


def test_a_new_flag_says_it_was_raised_and_when_the_result_was_collected_in_utc(client: TestClient) -> None:
    send(client, sodium("na8", 118, 8))
    (text,) = texts(client)
    assert text.startswith("Raised: Sodium 118 mmol/L, at or below the critical limit of 120 mmol/L")
    assert "collected 2026-03-02 08:00 UTC (no lab time zone set)" in text


def test_a_lower_sodium_says_worse_and_names_the_previous_value(client: TestClient) -> None:
    send(client, sodium("na8", 118, 8))
    send(client, sodium("na9", 116, 9))
    raised, worse = texts(client)
    assert worse.startswith("Worse: Sodium 116 mmol/L")
    assert "previous sodium 118 mmol/L" in worse
    assert "collected 2026-03-02 09:00 UTC" in worse


def test_a_sodium_still_low_but_higher_says_better(client: TestClient) -> None:
    send(client, sodium("na8", 116, 8))
    send(client, sodium("na9", 119, 9))
    assert texts(client)[-1].startswith("Better: Sodium 119 mmol/L")
    assert "previous sodium 116 mmol/L" in texts(client)[-1]


def test_the_same_value_again_says_unchanged(client: TestClient) -> None:
    send(client, sodium("na8", 118, 8))
    send(client, sodium("na9", 118, 9))
    assert texts(client)[-1].startswith("Unchanged: Sodium 118 mmol/L")


def test_the_sentence_does_not_depend_on_arrival_order(client: TestClient) -> None:
    # The later result arrives first: the Flag still says "worse than 118", as when they arrive in order.
    send(client, sodium("na9", 116, 9))
    send(client, sodium("na8", 118, 8))
    assert texts(client)[-1].startswith("Worse: Sodium 116 mmol/L")
    assert "previous sodium 118 mmol/L" in texts(client)[-1]


def test_a_closed_flag_says_resolved_and_what_it_had_said(client: TestClient) -> None:
    send(client, sodium("na8", 118, 8))
    send(client, sodium("na9", 138, 9))
    closing = history(client)[-1]
    assert closing["status"] == "inactive"
    assert closing["code"]["text"].startswith("Resolved: no longer found in the latest results; it had said: "
                                              "Sodium 118 mmol/L")


def test_a_withdrawn_flag_names_the_result_entered_in_error(client: TestClient) -> None:
    send(client, observation("k1", code="2823-3", value=7.1))
    send(client, observation("k1", code="2823-3", value=7.1, status="entered-in-error"))
    last = history(client)[-1]
    assert last["status"] == "entered-in-error"
    assert last["code"]["text"].startswith("Withdrawn: the potassium 7.1 mmol/L it rested on was entered in error")


def test_the_rule_display_from_our_code_system_is_on_the_flag(client: TestClient) -> None:
    send(client, sodium("na8", 118, 8))
    (coding,) = history(client)[0]["code"]["coding"]
    system = client.get("/fhir/CodeSystem/rule").json()
    display = {c["code"]: c["display"] for c in system["concept"]}
    assert coding["display"] == display["sodium-critical-low"] == "Sodium critically low"


def test_every_rule_has_a_display_in_words_not_its_code(client: TestClient) -> None:
    system = client.get("/fhir/CodeSystem/rule").json()
    displays = {c["code"]: c["display"] for c in system["concept"]}
    assert set(displays) == {r.value for r in Rule}
    assert all(d != code and "-" not in d.split()[0] for code, d in displays.items())


@pytest.fixture
def chicago(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    ctx = build_context(Settings(data_dir=tmp_path, lab_timezone="America/Chicago", scheduler=False), clock=clock)
    try:
        with authorised_client(ctx) as c:
            yield c
    finally:
        ctx.db.dispose()


def test_with_a_lab_zone_the_collection_time_is_local_and_names_the_zone(chicago: TestClient) -> None:
    # 2026-03-02 08:00 UTC is 02:00 in Chicago (Central Standard Time, UTC-6, until 8 March 2026).
    send(chicago, observation("na8", value=118, effective="2026-03-02T08:00:00+00:00"))
    (text,) = texts(chicago)
    assert "collected 2026-03-02 02:00 America/Chicago" in text
    assert "UTC" not in text


# Glucose at or above 25 mmol/L is critical high (RCPath G158 2017). 600 mg/dL is 33.3 mmol/L (glucose
# 180.16 g/mol: 600 mg/dL = 6000 mg/L / 180.16 mg/mmol = 33.30 mmol/L).


def test_a_value_sent_in_another_unit_is_shown_in_that_unit_with_the_canonical_value_beside_it(
    client: TestClient,
) -> None:
    send(client, observation("g1", code="2345-7", value=600, unit="mg/dL"))
    (text,) = texts(client)
    assert text.startswith("Raised: Glucose 600 mg/dL (33.3 mmol/L), at or above the critical limit of 25 mmol/L")


def test_a_censored_value_keeps_its_comparator_in_both_units(client: TestClient) -> None:
    send(client, observation("g1", code="2345-7", value=600, unit="mg/dL", valueQuantity={
        "value": 600, "comparator": ">", "unit": "mg/dL", "system": "http://unitsofmeasure.org", "code": "mg/dL"}))
    (text,) = texts(client)
    assert "Glucose >600 mg/dL (>33.3 mmol/L)" in text


def test_a_value_sent_in_the_canonical_unit_is_shown_once(client: TestClient) -> None:
    send(client, observation("g1", code="14749-6", value=33.3, unit="mmol/L"))
    (text,) = texts(client)
    assert "Glucose 33.3 mmol/L, at or above" in text


def test_the_glucose_beside_a_corrected_sodium_is_shown_in_the_unit_the_lab_sent(client: TestClient) -> None:
    # Katz 1973 (factor 1.6 per 5.55 mmol/L above 5.55): sodium 118 with glucose 33.3 mmol/L reads 126 corrected.
    send(client, observation("na1", value=118), observation("g1", code="2345-7", value=600, unit="mg/dL"))
    sodium_flag = next(f for f in (e["resource"] for e in client.get("/fhir/Flag").json()["entry"])
                       if f["code"]["coding"][0]["code"] == "sodium-critical-low")
    assert "with glucose 600 mg/dL (33.3 mmol/L)" in sodium_flag["code"]["text"]
