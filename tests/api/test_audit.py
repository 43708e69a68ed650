"""AuditEvents: each ingest request and each Flag read or search leaves one, searchable, valid R4."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from typing import Any

from fastapi.testclient import TestClient
from fhir.resources.R4B.auditevent import AuditEvent

from tests.factories import HEADERS, bundle, dumps, observation


def audits(client: TestClient, query: str = "") -> list[dict[str, Any]]:
    return [e["resource"] for e in client.get(f"/fhir/AuditEvent?_count=100{query}").json()["entry"]]


def test_ingest_request_is_audited_with_counts_and_no_patient_data(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("batch", observation("a"), observation("b", status="bogus"))),
                headers={**HEADERS, "x-request-id": "req-123"})
    (event,) = audits(client, "&subtype=batch")
    AuditEvent.model_validate(event)
    assert event["action"] == "C" and event["outcome"] == "4"
    details = {d["type"]: d["valueString"] for e in event["entity"] for d in e.get("detail", [])}
    assert details == {"entries": "2", "status-201": "1", "status-400": "1"}
    assert not any(e.get("role", {}).get("code") == "1" for e in event["entity"])  # no patient entity
    assert {"identifier": {"value": "req-123"}} in [e.get("what") for e in event["entity"]]


def test_refused_transaction_is_audited_as_a_failure(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("transaction", observation("a", status="bogus"))), headers=HEADERS)
    (event,) = audits(client, "&subtype=transaction")
    assert event["outcome"] == "4"


def test_flag_search_is_audited_once_per_patient_returned(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("batch", observation("a", value=118),
                                              observation("b", value=118, patient="Patient/p2"))), headers=HEADERS)
    client.get("/fhir/Flag")
    events = audits(client, "&subtype=search-type")
    assert len(events) == 2
    for event in events:
        AuditEvent.model_validate(event)
        assert event["meta"]["profile"][0].endswith("IHE.BasicAudit.PatientQuery")
    assert len(audits(client, "&subtype=search-type&patient=Patient/p2")) == 1


def test_flag_read_is_audited(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("batch", observation("a", value=118))), headers=HEADERS)
    flag = client.get("/fhir/Flag").json()["entry"][0]["resource"]
    client.get(f"/fhir/Flag/{flag['id']}")
    (event,) = audits(client, "&subtype=read")
    assert event["action"] == "R"
    assert {"reference": f"Flag/{flag['id']}/_history/1"} in [e.get("what") for e in event["entity"]]


def test_empty_search_leaves_one_query_audit_without_patient(client: TestClient) -> None:
    client.get("/fhir/Flag?patient=Patient/nobody")
    (event,) = audits(client, "&subtype=search-type")
    assert event["meta"]["profile"][0].endswith("IHE.BasicAudit.Query")
    assert not any(e.get("role", {}).get("code") == "1" for e in event["entity"])


# Observation and MedicationAdministration carry patient data as much as Flags do: BALP asks the
# same of their reads (IHE ITI BALP, "Basic AuditEvent for a successful Read with Patient" and
# "... Query with Patient" — profiles IHE.BasicAudit.PatientRead / PatientQuery).

def test_observation_read_is_audited_with_its_patient(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("batch", observation("a"))), headers=HEADERS)
    obs = client.get("/fhir/Observation").json()["entry"][0]["resource"]
    client.get(f"/fhir/Observation/{obs['id']}")
    (event,) = audits(client, "&subtype=read")
    AuditEvent.model_validate(event)
    assert event["meta"]["profile"][0].endswith("IHE.BasicAudit.PatientRead")
    whats = [e.get("what") for e in event["entity"]]
    assert {"reference": f"Observation/{obs['id']}/_history/1"} in whats
    assert {"reference": "Patient/p1"} in whats


def test_observation_search_is_audited_once_per_patient_returned(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("batch", observation("a"), observation("b"),
                                              observation("c", patient="Patient/p2"))), headers=HEADERS)
    client.get("/fhir/Observation")
    events = audits(client, "&subtype=search-type")
    assert len(events) == 2
    for event in events:
        AuditEvent.model_validate(event)
        assert event["meta"]["profile"][0].endswith("IHE.BasicAudit.PatientQuery")
        query = next(e for e in event["entity"] if e.get("role", {}).get("code") == "24")
        assert query["description"].startswith("GET Observation")
    (p1,) = audits(client, "&subtype=search-type&patient=Patient/p1")
    assert sum(1 for e in p1["entity"] if e.get("what", {}).get("reference", "").startswith("Observation/")) == 2


def test_observation_search_that_finds_nothing_leaves_one_query_audit(client: TestClient) -> None:
    client.get("/fhir/Observation?patient=Patient/nobody")
    (event,) = audits(client, "&subtype=search-type")
    assert event["meta"]["profile"][0].endswith("IHE.BasicAudit.Query")


def test_observation_history_is_audited(client: TestClient) -> None:
    client.post("/fhir", content=dumps(bundle("batch", observation("a"))), headers=HEADERS)
    obs = client.get("/fhir/Observation").json()["entry"][0]["resource"]
    client.get(f"/fhir/Observation/{obs['id']}/_history")
    (event,) = audits(client, "&subtype=history-instance")
    assert {"reference": "Patient/p1"} in [e.get("what") for e in event["entity"]]
