"""Patient identity on Flags: every name the feed used for the patient is on the Flag, in the places an
R4 client reads them (subject.reference, subject.identifier, and our subject-alias extension for the rest),
and subscriptions can filter by an identifier.

Sodium 118 mmol/L is at or below the critical low of 120 mmol/L (RCPath G158 2017), so it raises
sodium-critical-low.
"""

from __future__ import annotations

from typing import Any

import orjson
from fastapi.testclient import TestClient
from fhir.resources.R4B.flag import Flag

from service.api.context import AppContext
from service.notify.topics import FLAG_CHANGED
from tests.api.test_paging import events, send
from tests.api.test_subscriptions import subscription
from tests.factories import HEADERS, observation

ALIAS_URL = "https://lytestream.example/fhir/StructureDefinition/subject-alias"


def only_flag(client: TestClient) -> dict[str, Any]:
    (entry,) = client.get("/fhir/Flag").json()["entry"]
    return dict(entry["resource"])


def low_sodium(ident: str, subject: dict[str, Any]) -> dict[str, Any]:
    obs = observation(ident, value=118)
    obs["subject"] = subject
    return obs


def test_a_flag_carries_the_literal_reference_and_the_mrn_the_feed_sent(client: TestClient) -> None:
    send(client, low_sodium("a", {"reference": "Patient/p9", "identifier": {"system": "urn:mrn", "value": "9"}}))
    subject = only_flag(client)["subject"]
    assert subject["reference"] == "Patient/p9"
    assert subject["identifier"] == {"system": "urn:mrn", "value": "9"}
    assert "extension" not in subject  # nothing left over to list


def test_every_further_identifier_is_listed_in_the_subject_alias_extension(client: TestClient) -> None:
    send(client, low_sodium("a", {"reference": "Patient/p9", "identifier": {"system": "urn:mrn", "value": "9"}}),
         low_sodium("b", {"reference": "Patient/p9", "identifier": {"system": "urn:other-mrn", "value": "X-9"}}))
    subject = only_flag(client)["subject"]
    names = [subject["identifier"], *(e["valueIdentifier"] for e in subject["extension"]
                                      if e["url"] == ALIAS_URL)]
    assert sorted(names, key=lambda i: i["system"]) == [{"system": "urn:mrn", "value": "9"},
                                                        {"system": "urn:other-mrn", "value": "X-9"}]


def test_a_patient_known_only_by_identifier_has_no_reference(client: TestClient) -> None:
    send(client, low_sodium("a", {"identifier": {"system": "urn:mrn", "value": "55"}}))
    subject = only_flag(client)["subject"]
    assert subject == {"identifier": {"system": "urn:mrn", "value": "55"}}


def test_the_flag_with_every_alias_validates_as_r4b(client: TestClient) -> None:
    send(client, low_sodium("a", {"reference": "Patient/p9", "identifier": {"system": "urn:mrn", "value": "9"}}),
         low_sodium("b", {"reference": "Patient/p9", "identifier": {"system": "urn:other-mrn", "value": "X-9"}}))
    Flag.model_validate(only_flag(client))


def subscribe_filtered(client: TestClient, criteria: str) -> Any:
    sub = subscription(topic=FLAG_CHANGED, filters=criteria)
    return client.post("/fhir/Subscription", content=orjson.dumps(sub), headers=HEADERS)


def test_a_subscription_filtered_by_patient_identifier_gets_only_that_patients_flags(
    client: TestClient, context: AppContext
) -> None:
    r = subscribe_filtered(client, "Flag?patient:identifier=urn:other-mrn|X-9")
    assert r.status_code == 201, r.text
    send(client, low_sodium("a", {"reference": "Patient/p9", "identifier": {"system": "urn:mrn", "value": "9"}}),
         low_sodium("b", {"reference": "Patient/p9", "identifier": {"system": "urn:other-mrn", "value": "X-9"}}),
         low_sodium("c", {"identifier": {"system": "urn:mrn", "value": "55"}}))
    flagged = {e["resource"]["id"]: e["resource"]["subject"] for e in client.get("/fhir/Flag").json()["entry"]}
    p9 = next(fid for fid, s in flagged.items() if s.get("reference") == "Patient/p9")
    assert {fid for fid, _ in events(context, r.json()["id"])} == {p9}


def test_a_patient_identifier_filter_needs_system_and_value(client: TestClient) -> None:
    r = subscribe_filtered(client, "Flag?patient:identifier=9")
    assert r.status_code == 422  # as every Subscription we cannot honour
    assert "system|value" in r.text
