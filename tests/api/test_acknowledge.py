"""$acknowledge: the team records that it has seen a Flag; it is audited and stops escalation."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from dataclasses import replace
from datetime import timedelta
from typing import Any

import orjson
import pytest
from fastapi.testclient import TestClient
from fhir.resources.R4B.flag import Flag

from service.acknowledging import AckOutcome, acknowledge
from service.api.context import AppContext
from service.clock import FixedClock
from service.db.acks import due_escalations
from service.errors import NotFound
from service.fhir.audit_render import Requester
from service.notify.topics import FLAG_ALERT, FLAG_CHANGED
from tests.api.test_paging import events, subscribe
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


# ---- the acknowledgement on the Flag itself (a new version, our flag-acknowledgement extension) ----------

ACK_URL = "https://lytestream.example/fhir/StructureDefinition/flag-acknowledgement"


def current(client: TestClient, flag_id: str) -> dict[str, Any]:
    return dict(client.get(f"/fhir/Flag/{flag_id}").json())


def acknowledgement(flag: dict[str, Any]) -> dict[str, Any] | None:
    """The flag-acknowledgement extension as {sub-extension url: value}, or None when the Flag has none."""
    found = [e for e in flag["extension"] if e["url"] == ACK_URL]
    if not found:
        return None
    (ext,) = found
    return {sub["url"]: next(v for k, v in sub.items() if k.startswith("value")) for sub in ext["extension"]}


def ack_as(client: TestClient, flag_id: str, *parameters: dict[str, Any]):  # type: ignore[no-untyped-def]
    body = {"resourceType": "Parameters", "parameter": list(parameters)}
    return client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=orjson.dumps(body), headers=HEADERS)


def test_acknowledging_writes_a_new_flag_version_showing_who_when_and_the_note(
    client: TestClient, clock: FixedClock
) -> None:
    flag_id = raise_flag(client)
    assert acknowledgement(current(client, flag_id)) is None
    clock.advance(timedelta(minutes=4))
    r = ack_as(client, flag_id, {"name": "note", "valueString": "K drawn again"},
               {"name": "who", "valueString": "Charge nurse A. Okafor"})
    assert r.status_code == 200, r.text
    flag = current(client, flag_id)
    assert flag["meta"]["versionId"] == "2"
    assert acknowledgement(flag) == {
        "by": "Charge nurse A. Okafor", "client": "test-suite",
        "when": clock.now().isoformat().replace("+00:00", "Z"), "note": "K drawn again",
        "acknowledgedVersion": 1,
    }
    assert flag["code"]["text"].startswith("Acknowledged by Charge nurse A. Okafor")
    params = {p["name"]: p for p in r.json()["parameter"]}
    assert params["flag"]["valueReference"]["reference"] == f"Flag/{flag_id}/_history/2"
    assert params["by"]["valueString"] == "Charge nurse A. Okafor"


def test_without_a_who_the_acknowledger_is_the_tokens_client(client: TestClient) -> None:
    flag_id = raise_flag(client)
    ack(client, flag_id)
    ext = acknowledgement(current(client, flag_id))
    assert ext is not None and ext["by"] == "test-suite" and ext["client"] == "test-suite"


def test_who_may_be_a_reference_with_a_display(client: TestClient) -> None:
    flag_id = raise_flag(client)
    r = ack_as(client, flag_id, {"name": "who", "valueReference": {"reference": "Practitioner/rn-7",
                                                                   "display": "RN B. Silva"}})
    assert r.status_code == 200, r.text
    ext = acknowledgement(current(client, flag_id))
    assert ext is not None and ext["by"] == "RN B. Silva"


def test_a_who_of_the_wrong_type_is_refused_with_its_path(client: TestClient) -> None:
    flag_id = raise_flag(client)
    r = ack_as(client, flag_id, {"name": "who", "valueInteger": 7})
    assert r.status_code == 400
    (issue,) = r.json()["issue"]
    assert issue["expression"] == ["Parameters.parameter[0].valueString"]
    assert current(client, flag_id)["meta"]["versionId"] == "1"


def test_a_blank_or_overlong_who_is_refused(client: TestClient) -> None:
    flag_id = raise_flag(client)
    assert ack_as(client, flag_id, {"name": "who", "valueString": "   "}).status_code == 400
    assert ack_as(client, flag_id, {"name": "who", "valueString": "x" * 201}).status_code == 400
    assert ack_as(client, flag_id, {"name": "who", "valueReference": {"reference": "Practitioner/1"}}
                  ).status_code == 400  # a reference without a display names nobody a reader can see


def test_an_overlong_note_is_refused_rather_than_cut(client: TestClient) -> None:
    flag_id = raise_flag(client)
    r = ack_as(client, flag_id, {"name": "note", "valueString": "n" * 2001})
    assert r.status_code == 400
    assert "2000" in r.json()["issue"][0]["diagnostics"]


def test_a_second_acknowledgement_of_the_same_version_is_a_no_op_that_says_who_and_when(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    changed = subscribe(client, FLAG_CHANGED)
    flag_id = raise_flag(client)
    first_at = clock.now()
    ack_as(client, flag_id, {"name": "who", "valueString": "Dr C. Nwosu"})
    clock.advance(timedelta(minutes=1))
    r = ack_as(client, flag_id, {"name": "who", "valueString": "RN D. Haddad"})
    assert r.status_code == 200
    params = {p["name"]: p for p in r.json()["parameter"]}
    assert params["already"]["valueBoolean"] is True
    assert params["by"]["valueString"] == "Dr C. Nwosu"
    assert params["acknowledged"]["valueDateTime"] == first_at.isoformat().replace("+00:00", "Z")
    assert "Dr C. Nwosu" in params["message"]["valueString"]
    assert current(client, flag_id)["meta"]["versionId"] == "2"
    assert [v for _, v in events(context, changed)] == [1, 2]
    # Still audited: both attempts leave an AuditEvent.
    assert len(client.get("/fhir/AuditEvent?subtype=acknowledge").json()["entry"]) == 2


def test_the_acknowledgement_version_goes_on_flag_changed_but_pages_nobody(
    client: TestClient, context: AppContext
) -> None:
    changed, alert = subscribe(client, FLAG_CHANGED), subscribe(client, FLAG_ALERT)
    flag_id = raise_flag(client)
    ack(client, flag_id)
    assert events(context, changed) == [(flag_id, 1), (flag_id, 2)]
    assert events(context, alert) == [(flag_id, 1)]


def test_later_versions_keep_showing_the_acknowledgement_while_it_covers_the_priority(
    client: TestClient, clock: FixedClock
) -> None:
    flag_id = raise_flag(client)  # sodium 118 at 08:00
    ack_as(client, flag_id, {"name": "who", "valueString": "Dr C. Nwosu"})
    clock.advance(timedelta(minutes=30))
    client.post("/fhir", content=dumps(bundle("batch", observation("b", value=117,
                effective="2026-03-02T08:20:00+00:00"))), headers=HEADERS)
    flag = current(client, flag_id)
    assert flag["meta"]["versionId"] == "3"  # the rule's new version, after the acknowledgement's
    ext = acknowledgement(flag)
    assert ext is not None and ext["by"] == "Dr C. Nwosu" and ext["acknowledgedVersion"] == 1


def test_a_recheck_after_an_acknowledgement_writes_no_new_version(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    flag_id = raise_flag(client)
    ack(client, flag_id)
    clock.advance(timedelta(minutes=5))
    assert context.evaluator.recheck(context.db, clock.now()) == 0
    assert current(client, flag_id)["meta"]["versionId"] == "2"


def test_the_acknowledged_flag_validates_as_r4b(client: TestClient) -> None:
    flag_id = raise_flag(client)
    ack_as(client, flag_id, {"name": "note", "valueString": "seen"}, {"name": "who", "valueString": "RN E"})
    Flag.model_validate(current(client, flag_id))


def test_the_service_function_says_what_it_did(client: TestClient, context: AppContext, clock: FixedClock) -> None:
    flag_id = raise_flag(client)
    who = Requester(client="board", address=None, request_id="r1")
    first = acknowledge(context, flag_id=flag_id, who=who, person="RN F. Lind", note="on it")
    again = acknowledge(context, flag_id=flag_id, who=who, person=None, note=None)
    assert first == AckOutcome(flag_id=flag_id, version_id=2, acknowledged_version=1, acknowledged_at=clock.now(),
                               by="RN F. Lind", client="board", note="on it", already=False)
    assert again == replace(first, already=True)


def test_the_service_function_raises_not_found_for_an_unknown_flag(context: AppContext) -> None:
    with pytest.raises(NotFound):
        acknowledge(context, flag_id="nope", who=Requester(client="board", address=None, request_id="r"),
                    person=None, note=None)


def test_acknowledging_a_newer_rule_version_after_an_acknowledgement_is_a_new_acknowledgement(
    client: TestClient, clock: FixedClock
) -> None:
    flag_id = raise_flag(client)
    ack_as(client, flag_id, {"name": "who", "valueString": "Dr C. Nwosu"})
    client.post("/fhir", content=dumps(bundle("batch", observation("b", value=117,
                effective="2026-03-02T08:20:00+00:00"))), headers=HEADERS)  # version 3, from the rule
    clock.advance(timedelta(minutes=2))
    r = ack_as(client, flag_id, {"name": "who", "valueString": "RN D. Haddad"})
    params = {p["name"]: p for p in r.json()["parameter"]}
    assert params["already"]["valueBoolean"] is False
    ext = acknowledgement(current(client, flag_id))
    assert ext is not None and ext["by"] == "RN D. Haddad" and ext["acknowledgedVersion"] == 3
    assert current(client, flag_id)["meta"]["versionId"] == "4"


def test_the_row_only_acknowledgement_kept_for_the_board_records_a_row_and_writes_no_version(
    client: TestClient, context: AppContext, clock: FixedClock
) -> None:
    from service.db.acks import acknowledge as row_only  # to be deleted once the board calls the service

    flag_id = raise_flag(client)
    with context.db.session(write=True) as session:
        assert row_only(session=session, flag_id=flag_id, client="board", note=None, now=clock.now()) is not None
    later = clock.now() + timedelta(minutes=16)
    with context.db.session() as session:
        assert due_escalations(session=session, after={"high": timedelta(minutes=15)}, now=later) == []
    assert current(client, flag_id)["meta"]["versionId"] == "1"
