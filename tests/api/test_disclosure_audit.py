"""A full-resource notification hands a patient's Flag to another system: each is audited as a
disclosure at the source (IHE ITI BALP, "Audit Event for Privacy Disclosure at Source",
IHE.BasicAudit.PrivacyDisclosure.Source: type DICOM 110106 Export, subtype ISO 21089 "disclose", a
recipient agent, a patient entity and the data disclosed). An id-only notification carries no
patient data and is not a disclosure.
"""

# Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from typing import Any

import httpx
from fastapi.testclient import TestClient
from fhir.resources.R4B.auditevent import AuditEvent

from service.api.context import AppContext
from tests.api.test_subscriptions import hook, raise_flag, subscribe  # noqa: F401 - the hook fixture

_PROFILE = "https://profiles.ihe.net/ITI/BALP/StructureDefinition/IHE.BasicAudit.PrivacyDisclosure.Source"


def disclosures(client: TestClient) -> list[dict[str, Any]]:
    return [e["resource"] for e in client.get("/fhir/AuditEvent?subtype=disclose").json()["entry"]]


def test_a_full_resource_notification_is_audited_as_a_disclosure_of_the_patients_flag(
    client: TestClient, context: AppContext, hook: Any  # noqa: F811
) -> None:
    hook.respond(200)
    sub = subscribe(client, content="full-resource")
    context.dispatcher.run_once()  # the handshake carries no patient data
    assert disclosures(client) == []
    raise_flag(client)
    context.dispatcher.run_once()
    (event,) = disclosures(client)
    AuditEvent.model_validate(event)
    assert event["meta"]["profile"] == [_PROFILE]
    assert event["type"] == {"system": "http://dicom.nema.org/resources/ontology/DCM", "code": "110106",
                             "display": "Export"}
    assert event["subtype"] == [{"system": "http://terminology.hl7.org/CodeSystem/iso-21089-lifecycle",
                                 "code": "disclose"}]
    whats = [e.get("what") for e in event["entity"]]
    assert {"reference": "Patient/p1"} in whats
    flag = client.get("/fhir/Flag").json()["entry"][0]["resource"]
    assert {"reference": f"Flag/{flag['id']}/_history/1"} in whats
    assert {"reference": f"Subscription/{sub['id']}"} in whats
    recipient = next(a for a in event["agent"] if a["type"]["coding"][0]["code"] == "IRCP")
    assert recipient["who"]["identifier"]["value"] == "test-suite"  # the subscription's owner
    assert recipient["network"]["address"] == "https://pager.example.org"  # origin only: no path or query


def test_an_id_only_notification_is_not_a_disclosure(
    client: TestClient, context: AppContext, hook: Any  # noqa: F811
) -> None:
    hook.respond(200)
    subscribe(client, content="id-only")
    context.dispatcher.run_once()
    raise_flag(client)
    context.dispatcher.run_once()
    assert len(hook.calls) == 2
    assert disclosures(client) == []


def test_a_send_that_never_reached_the_receiver_is_not_a_disclosure(
    client: TestClient, context: AppContext, hook: Any  # noqa: F811
) -> None:
    hook.respond(200)
    subscribe(client, content="full-resource")
    context.dispatcher.run_once()
    hook.side_effect = httpx.ConnectError("refused")
    raise_flag(client)
    context.dispatcher.run_once()
    assert disclosures(client) == []


def test_a_receiver_that_answered_an_error_still_received_the_flag(
    client: TestClient, context: AppContext, hook: Any  # noqa: F811
) -> None:
    # The body arrived; the answer does not take it back. The event says the delivery failed.
    hook.respond(200)
    subscribe(client, content="full-resource")
    context.dispatcher.run_once()
    hook.respond(500)
    raise_flag(client)
    context.dispatcher.run_once()
    (event,) = disclosures(client)
    assert event["outcome"] == "4"


def test_events_fetched_with_full_resources_are_audited_per_patient(
    client: TestClient, context: AppContext, hook: Any  # noqa: F811
) -> None:
    hook.respond(200)
    sub = subscribe(client)
    raise_flag(client)
    raise_flag(client, ident="b", patient="Patient/p2")
    client.get(f"/fhir/Subscription/{sub['id']}/$events?content=full-resource")
    events = [e["resource"] for e in client.get("/fhir/AuditEvent?subtype=events").json()["entry"]]
    assert len(events) == 2
    for event in events:
        AuditEvent.model_validate(event)
        assert event["meta"]["profile"][0].endswith("IHE.BasicAudit.PatientQuery")
    assert {w.get("reference") for e in events for w in [x.get("what", {}) for x in e["entity"]]} >= {
        "Patient/p1", "Patient/p2"}


def test_an_event_the_service_records_of_its_own_accord_carries_no_empty_request_id() -> None:
    # FHIR R4 string: "Strings SHALL NOT be empty" (datatypes, string). A delivery or a scheduled job
    # answers no inbound request, so it has no request id to record, and must not record an empty one.
    from datetime import UTC, datetime

    from service.fhir.audit_render import AuditFacts, Requester, audit_event

    for subtype in ("disclose", "purge", "operation"):
        event = audit_event(AuditFacts(subtype=subtype, recorded=datetime(2026, 3, 2, tzinfo=UTC),
                                       requester=Requester(client="scheduler", address=None, request_id=""),
                                       what=["Flag/f/_history/1"], patient={"reference": "Patient/p1"}),
                            base_url="http://testserver/fhir")
        values = [e["what"]["identifier"]["value"] for e in event["entity"] if "identifier" in e.get("what", {})]
        assert all(v.strip() for v in values), subtype
