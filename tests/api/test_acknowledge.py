"""$acknowledge: the team records that it has seen a Flag; it is audited and stops escalation."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from datetime import timedelta

import orjson
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.clock import FixedClock
from service.db.acks import due_escalations
from tests.factories import HEADERS, bundle, dumps, observation


def raise_flag(client: TestClient) -> str:
    client.post("/fhir", content=dumps(bundle("batch", observation("a", value=118))), headers=HEADERS)
    return str(client.get("/fhir/Flag").json()["entry"][0]["resource"]["id"])


def ack(client: TestClient, flag_id: str, note: str | None = "seen by the team"):  # type: ignore[no-untyped-def]
    body = {"resourceType": "Parameters", "parameter": [{"name": "note", "valueString": note}]} if note else None
    return client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=orjson.dumps(body) if body else b"",
                       headers=HEADERS)


def test_acknowledge_returns_who_and_when(client: TestClient, clock: FixedClock) -> None:
    r = ack(client, raise_flag(client))
    assert r.status_code == 200
    params = {p["name"]: p for p in r.json()["parameter"]}
    assert params["by"]["valueString"] == "test-suite"  # the client the token was minted for
    assert params["acknowledged"]["valueDateTime"] == clock.now().isoformat().replace("+00:00", "Z")


def test_acknowledge_is_audited_with_the_patient(client: TestClient) -> None:
    ack(client, raise_flag(client))
    events = client.get("/fhir/AuditEvent?subtype=acknowledge").json()["entry"]
    assert len(events) == 1
    assert {"reference": "Patient/p1"} in [e.get("what") for e in events[0]["resource"]["entity"]]


def test_acknowledging_an_unknown_flag_is_404(client: TestClient) -> None:
    assert ack(client, "nope").status_code == 404


def test_acknowledging_a_closed_flag_is_refused(client: TestClient) -> None:
    flag_id = raise_flag(client)
    client.post("/fhir", content=dumps(bundle("batch", observation("a", value=138, status="corrected"))),
                headers=HEADERS)
    r = ack(client, flag_id)
    assert r.status_code == 409


def test_note_must_be_a_string(client: TestClient) -> None:
    flag_id = raise_flag(client)
    body = {"resourceType": "Parameters", "parameter": [{"name": "note", "valueInteger": 3}]}
    r = client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=orjson.dumps(body), headers=HEADERS)
    assert r.status_code == 400


def test_acknowledged_flag_is_no_longer_due_for_escalation(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    flag_id = raise_flag(client)
    later = clock.now() + timedelta(minutes=16)
    after = {"high": timedelta(minutes=15)}
    with context.db.session() as session:
        assert [d.flag_id for d in due_escalations(session=session, after=after, now=later)] == [flag_id]
    ack(client, flag_id)
    with context.db.session() as session:
        assert due_escalations(session=session, after=after, now=later) == []


def test_acknowledge_is_audited_as_an_update_of_the_flag(client: TestClient) -> None:
    # Acknowledging changes the Flag (a new version): BALP's "successful Update with a Patient
    # subject" (IHE.BasicAudit.PatientUpdate, action U), not a Create.
    flag_id = raise_flag(client)
    ack(client, flag_id)
    (entry,) = client.get("/fhir/AuditEvent?subtype=acknowledge").json()["entry"]
    event = entry["resource"]
    assert event["meta"]["profile"] == ["https://profiles.ihe.net/ITI/BALP/StructureDefinition/"
                                        "IHE.BasicAudit.PatientUpdate"]
    assert event["action"] == "U"
