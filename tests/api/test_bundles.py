"""POST /fhir: transaction is all-or-nothing, batch keeps its good entries, panels are triaged."""

from __future__ import annotations

from fastapi.testclient import TestClient

from tests.factories import HEADERS, dumps, insulin, observation


def send(client: TestClient, body: dict, **headers: str):  # type: ignore[no-untyped-def]
    return client.post("/fhir", content=dumps(body), headers={**HEADERS, **headers})


def bundle(kind: str, *resources: dict, method: str = "POST") -> dict:
    from tests.factories import bundle as make

    return make(kind, *resources, method=method)


def stored(client: TestClient, patient: str = "Patient/p1") -> int:
    return int(client.get(f"/fhir/Observation?patient={patient}").json()["total"])


def test_transaction_response_has_one_entry_per_request_in_order(client: TestClient) -> None:
    r = send(client, bundle("transaction", observation("A"), observation("B", code="2823-3", value=4.1)))
    assert r.status_code == 200
    body = r.json()
    assert body["type"] == "transaction-response"
    assert [e["response"]["status"] for e in body["entry"]] == ["201 Created", "201 Created"]
    assert all(e["response"]["location"].startswith("Observation/") for e in body["entry"])


def test_failed_transaction_leaves_no_trace(client: TestClient) -> None:
    bad = observation("B", unit="g/L")
    r = send(client, bundle("transaction", observation("A"), bad))
    assert r.status_code == 422
    assert r.json()["resourceType"] == "OperationOutcome"
    assert r.json()["issue"][0]["expression"] == ["Bundle.entry[1].resource.valueQuantity.code"]
    assert stored(client) == 0


def test_batch_keeps_good_entries_and_reports_the_bad_one(client: TestClient) -> None:
    r = send(client, bundle("batch", observation("A"), observation("B", status="bogus"), observation("C")))
    assert r.status_code == 200
    statuses = [e["response"]["status"] for e in r.json()["entry"]]
    assert statuses == ["201 Created", "400 Bad Request", "201 Created"]
    outcome = r.json()["entry"][1]["response"]["outcome"]
    assert outcome["issue"][0]["expression"] == ["Bundle.entry[1].resource.status"]
    assert stored(client) == 2


def test_unwatched_analytes_in_a_panel_are_acknowledged_and_not_stored(client: TestClient) -> None:
    chloride = observation("CL", code="2075-0", value=101)
    creatinine = {"resourceType": "Observation", "status": "final",
                  "code": {"coding": [{"system": "http://loinc.org", "code": "2160-0"}]}}
    r = send(client, bundle("transaction", observation("NA"), chloride, creatinine))
    entries = r.json()["entry"]
    assert [e["response"]["status"] for e in entries] == ["201 Created", "200 OK", "200 OK"]
    assert "not stored" in entries[1]["response"]["outcome"]["issue"][0]["diagnostics"]
    assert stored(client) == 1


def test_transaction_conditional_updates_are_idempotent(client: TestClient) -> None:
    body = bundle("transaction", observation("A"), observation("B", value=119), method="PUT")
    send(client, body)
    again = send(client, body).json()
    assert [e["response"]["status"] for e in again["entry"]] == ["200 OK", "200 OK"]
    assert [e["response"]["etag"] for e in again["entry"]] == ['W/"1"', 'W/"1"']


def test_patient_entry_links_urn_uuid_reference_and_identifier(client: TestClient) -> None:
    patient = {"resourceType": "Patient", "identifier": [{"system": "urn:oid:1.2.36.1", "value": "12345"}]}
    obs = observation("A", patient="urn:uuid:61ebe359-bfdc-4613-8bf2-c5e300945f0a")
    body = {"resourceType": "Bundle", "type": "transaction", "entry": [
        {"fullUrl": "urn:uuid:61ebe359-bfdc-4613-8bf2-c5e300945f0a", "resource": patient,
         "request": {"method": "POST", "url": "Patient", "ifNoneExist": "identifier=urn:oid:1.2.36.1|12345"}},
        {"resource": obs, "request": {"method": "POST", "url": "Observation"}},
    ]}
    assert send(client, body).status_code == 200
    # A later result names the same patient by identifier only: it joins the same timeline.
    later = observation("B", patient="Patient/ignored")
    later["subject"] = {"identifier": {"system": "urn:oid:1.2.36.1", "value": "12345"}}
    send(client, bundle("batch", later))
    found = client.get("/fhir/Observation?patient:identifier=urn:oid:1.2.36.1|12345").json()
    assert found["total"] == 2


def test_conditional_patient_reference_resolves_to_the_identifier(client: TestClient) -> None:
    send(client, bundle("transaction", observation("A", patient="Patient?identifier=urn:mrn|77")))
    found = client.get("/fhir/Observation?patient:identifier=urn:mrn|77").json()
    assert found["total"] == 1


def test_reference_and_identifier_together_link_both_names(client: TestClient) -> None:
    obs = observation("A")
    obs["subject"] = {"reference": "Patient/p9", "identifier": {"system": "urn:mrn", "value": "9"}}
    send(client, bundle("batch", obs))
    send(client, bundle("batch", observation("B", patient="Patient/p9")))
    assert client.get("/fhir/Observation?patient:identifier=urn:mrn|9").json()["total"] == 2


def test_prefer_representation_puts_resources_in_the_response(client: TestClient) -> None:
    r = send(client, bundle("batch", observation("A")), prefer="return=representation")
    assert r.json()["entry"][0]["resource"]["resourceType"] == "Observation"


def test_insulin_administration_is_stored_and_other_medications_are_not(client: TestClient) -> None:
    other = insulin("M2", atc="C03CA01")
    r = send(client, bundle("batch", insulin("M1"), other))
    statuses = [e["response"]["status"] for e in r.json()["entry"]]
    assert statuses == ["201 Created", "200 OK"]
    loc = r.json()["entry"][0]["response"]["location"]
    assert client.get(f"/fhir/{loc}").json()["resourceType"] == "MedicationAdministration"


def test_late_result_lands_in_effective_time_order(client: TestClient) -> None:
    send(client, bundle("batch", observation("late", effective="2026-03-02T06:00:00+00:00", value=120),
                        observation("early", effective="2026-03-02T09:00:00+00:00", value=126)))
    found = client.get("/fhir/Observation?patient=Patient/p1&_sort=date").json()
    values = [e["resource"]["valueQuantity"]["value"] for e in found["entry"]]
    assert values == [120, 126]
