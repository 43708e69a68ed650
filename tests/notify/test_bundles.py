"""Notification, $status and $events Bundles: both forms, every type, each content level.

Shapes: Subscriptions R5 Backport IG — backport-subscription-notification-r4 / backport-subscription-status-r4
(R4 Parameters form), backport-subscription-notification (R4B SubscriptionStatus form), OperationDefinitions
backport-subscription-status and backport-subscription-events.
History Bundle rules: FHIR R4 bdl-3/bdl-4/bdl-8.
"""

from __future__ import annotations

import itertools
from datetime import UTC, datetime
from typing import Any

import pytest
from fhir.resources.R4B import get_fhir_model_class

from service.notify.bundles import (
    ErrorNote,
    NotificationEvent,
    SubscriptionState,
    event_notification,
    events_response,
    handshake,
    heartbeat,
    interaction_for,
    status_response,
)
from service.notify.topics import CONTENT_CODES, FLAG_CHANGED, FORM_R4, FORM_R4B

BASE = "https://lytestream.example.org/fhir"
NOW = datetime(2024, 3, 1, 8, 41, 16, tzinfo=UTC)
SD = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"
FORMS = (FORM_R4, FORM_R4B)


def state(form: str = FORM_R4, content: str = "id-only", status: str = "active", count: int = 42,
          errors: tuple[ErrorNote, ...] = ()) -> SubscriptionState:
    return SubscriptionState(id="rrt-1", topic=FLAG_CHANGED, status=status, events_since_start=count,
                             content=content, form=form, base=BASE, errors=errors)


def event(number: int = 42, interaction: str = "create", rid: str = "f1") -> NotificationEvent:
    flag = {"resourceType": "Flag", "id": rid, "meta": {"versionId": "3"}, "status": "active",
            "code": {"text": "Sodium critically low"}, "subject": {"reference": "Patient/123"}}
    return NotificationEvent(number=number, timestamp=datetime(2024, 3, 1, 8, 41, 15, tzinfo=UTC),
                             focus=f"Flag/{rid}", interaction=interaction, version_id="3",
                             last_updated=NOW, resource=flag, additional_context=("Observation/o9",))


def validate(bundle: dict[str, Any]) -> Any:
    """R4B model validation, plus the invariants that library does not check (see fhir-notes §0)."""
    model = get_fhir_model_class("Bundle").model_validate(bundle)
    if bundle["type"] == "history":
        for i, e in enumerate(bundle["entry"]):
            assert "request" in e and "response" in e, f"bdl-3/bdl-4: entry[{i}] needs request and response"
            assert "/_history/" not in e.get("fullUrl", ""), "bdl-8: fullUrl is never version-specific"
    else:
        assert all("request" not in e for e in bundle["entry"]), \
            "bdl-3: request only in batch/transaction/history"
    return model


def status_of(bundle: dict[str, Any]) -> dict[str, Any]:
    return bundle["entry"][0]["resource"]  # type: ignore[no-any-return]


def params(p: dict[str, Any], name: str) -> list[dict[str, Any]]:
    return [x for x in p["parameter"] if x["name"] == name]


def one_param(p: dict[str, Any], name: str) -> Any:
    [x] = params(p, name)
    return next(v for k, v in x.items() if k.startswith("value"))


ALL_BUILDS = {
    "handshake": lambda s: handshake(s, now=NOW),
    "heartbeat": lambda s: heartbeat(s, now=NOW),
    "event-notification": lambda s: event_notification(s, [event()], now=NOW),
    "query-event": lambda s: events_response(s, [event(41), event(42, "update")], now=NOW),
}


@pytest.mark.parametrize(("form", "content", "kind"),
                         list(itertools.product(FORMS, CONTENT_CODES, ALL_BUILDS)))
def test_every_notification_validates_with_r4b(form: str, content: str, kind: str) -> None:
    bundle = ALL_BUILDS[kind](state(form, content))
    model = validate(bundle)
    assert bundle["type"] == "history"
    expected = "Parameters" if form == FORM_R4 else "SubscriptionStatus"
    assert model.entry[0].resource.get_resource_type() == expected  # backport-notification-bundle(-r4)-1
    profile = {FORM_R4: f"{SD}/backport-subscription-notification-r4",
               FORM_R4B: f"{SD}/backport-subscription-notification"}[form]
    assert bundle["meta"]["profile"] == [profile]
    first = bundle["entry"][0]
    assert first["request"] == {"method": "GET", "url": f"{BASE}/Subscription/rrt-1/$status"}
    assert first["fullUrl"] == f"urn:uuid:{first['resource']['id']}"
    s = status_of(bundle)
    if form == FORM_R4:
        assert one_param(s, "type") == kind
        assert s["meta"]["profile"] == [f"{SD}/backport-subscription-status-r4"]
    else:
        assert s["type"] == kind


@pytest.mark.parametrize("form", FORMS)
def test_status_response_is_a_searchset_of_query_status(form: str) -> None:
    bundle = status_response([state(form), state(form, status="error", count=7,
                                                 errors=(ErrorNote("endpoint refused", "no-response"),))],
                             now=NOW)
    validate(bundle)
    assert bundle["type"] == "searchset"  # OperationDefinition backport-subscription-status
    assert bundle["total"] == 2
    assert all(e["search"] == {"mode": "match"} for e in bundle["entry"])
    second = bundle["entry"][1]["resource"]
    if form == FORM_R4:
        assert one_param(second, "type") == "query-status"
        assert one_param(second, "events-since-subscription-start") == "7"
        assert one_param(second, "error")["coding"][0]["code"] == "no-response"
        assert params(second, "notification-event") == []
    else:
        assert (second["type"], second["eventsSinceSubscriptionStart"]) == ("query-status", "7")
        assert second["error"][0]["coding"][0]["system"] == \
            "http://terminology.hl7.org/CodeSystem/subscription-error"
        assert "notificationEvent" not in second


def test_r4_event_parameters_carry_numbers_as_strings() -> None:
    bundle = event_notification(state(FORM_R4, count=42), [event(42)], now=NOW)
    s = status_of(bundle)
    assert one_param(s, "subscription") == {"reference": f"{BASE}/Subscription/rrt-1"}
    assert one_param(s, "topic") == FLAG_CHANGED
    assert one_param(s, "status") == "active"
    assert one_param(s, "events-since-subscription-start") == "42"
    [ev] = params(s, "notification-event")
    parts = {p["name"]: p for p in ev["part"]}
    assert parts["event-number"] == {"name": "event-number", "valueString": "42"}
    assert parts["timestamp"]["valueInstant"] == "2024-03-01T08:41:15Z"
    assert parts["focus"]["valueReference"] == {"reference": f"{BASE}/Flag/f1"}
    assert parts["additional-context"]["valueReference"] == {"reference": f"{BASE}/Observation/o9"}


def test_r4b_status_numbers_are_strings_and_ints_are_refused_by_r4b() -> None:
    bundle = event_notification(state(FORM_R4B, count=42), [event(42)], now=NOW)
    s = status_of(bundle)
    assert s["eventsSinceSubscriptionStart"] == "42"
    assert s["notificationEvent"][0]["eventNumber"] == "42"
    assert s["notificationEvent"][0]["focus"] == {"reference": f"{BASE}/Flag/f1"}
    # Guard that the check above matters: R4B types these as string and rejects an integer.
    s["eventsSinceSubscriptionStart"] = 42
    with pytest.raises(ValueError):
        get_fhir_model_class("Bundle").model_validate(bundle)


@pytest.mark.parametrize("form", FORMS)
def test_id_only_entries_have_no_resource(form: str) -> None:
    bundle = event_notification(state(form, "id-only"), [event(42, "create"), event(43, "update", "f2")],
                                now=NOW)
    validate(bundle)
    created, updated = bundle["entry"][1:]
    assert created == {"fullUrl": f"{BASE}/Flag/f1", "request": {"method": "POST", "url": "Flag"},
                       "response": {"status": "201 Created", "location": "Flag/f1/_history/3",
                                    "etag": 'W/"3"', "lastModified": "2024-03-01T08:41:16Z"}}
    assert updated["request"] == {"method": "PUT", "url": "Flag/f2"}
    assert updated["response"]["status"] == "200 OK"
    assert "resource" not in updated


@pytest.mark.parametrize("form", FORMS)
def test_full_resource_entries_carry_the_flag(form: str) -> None:
    bundle = event_notification(state(form, "full-resource"), [event()], now=NOW)
    model = validate(bundle)
    assert bundle["entry"][1]["resource"]["id"] == "f1"
    assert model.entry[1].resource.get_resource_type() == "Flag"


def test_full_resource_without_the_resource_is_an_error() -> None:
    bare = NotificationEvent(number=1, timestamp=NOW, focus="Flag/f1")
    with pytest.raises(ValueError, match="full-resource"):
        event_notification(state(content="full-resource"), [bare], now=NOW)


@pytest.mark.parametrize("form", FORMS)
def test_empty_content_has_no_focus_topic_or_other_entries(form: str) -> None:
    bundle = event_notification(state(form, "empty"), [event()], now=NOW)
    validate(bundle)
    assert len(bundle["entry"]) == 1
    s = status_of(bundle)
    if form == FORM_R4:
        assert params(s, "topic") == []  # backport-subscription-status-r4: topic SHOULD NOT with empty
        [ev] = params(s, "notification-event")
        assert {p["name"] for p in ev["part"]} == {"event-number", "timestamp"}
    else:
        assert "topic" not in s
        assert s["notificationEvent"] == [{"eventNumber": "42", "timestamp": "2024-03-01T08:41:15Z"}]


@pytest.mark.parametrize("form", FORMS)
def test_handshake_and_heartbeat_have_no_events(form: str) -> None:
    hs = handshake(state(form, status="requested", count=0), now=NOW)
    hb = heartbeat(state(form, count=5), now=NOW)
    cases = ((hs, "handshake", "0", "requested"), (hb, "heartbeat", "5", "active"))
    for bundle, kind, count, status in cases:
        assert len(bundle["entry"]) == 1
        s = status_of(bundle)
        if form == FORM_R4:
            assert (one_param(s, "type"), one_param(s, "status")) == (kind, status)
            assert one_param(s, "events-since-subscription-start") == count
            assert params(s, "notification-event") == []
        else:
            assert (s["type"], s["status"], s["eventsSinceSubscriptionStart"]) == (kind, status, count)
            assert "notificationEvent" not in s


def test_events_response_honours_a_content_hint_and_may_be_empty() -> None:
    bundle = events_response(state(content="id-only"), [event()], now=NOW, content="empty")
    assert len(bundle["entry"]) == 1
    nothing = events_response(state(), [], now=NOW)
    validate(nothing)
    assert params(status_of(nothing), "notification-event") == []
    with pytest.raises(ValueError):
        events_response(state(), [], now=NOW, content="everything")


def test_ids_are_injectable_for_reproducible_output() -> None:
    def ids() -> Any:
        counter = itertools.count(1)
        return lambda: f"00000000-0000-4000-8000-{next(counter):012d}"
    a = event_notification(state(), [event()], now=NOW, new_id=ids())
    b = event_notification(state(), [event()], now=NOW, new_id=ids())
    assert a == b
    assert a["entry"][0]["fullUrl"] == "urn:uuid:00000000-0000-4000-8000-000000000001"


def test_refuses_nonsense_state_and_empty_event_list() -> None:
    with pytest.raises(ValueError):
        state(content="all")
    with pytest.raises(ValueError):
        state(form="r5")
    with pytest.raises(ValueError):
        state(count=-1)
    with pytest.raises(ValueError):
        event_notification(state(), [], now=NOW)


@pytest.mark.parametrize(("kind", "interaction"), [("create", "create"), ("reactivate", "update"),
                                                   ("update", "update"), ("close", "update"),
                                                   ("withdraw", "update")])
def test_interaction_for_write_kinds(kind: str, interaction: str) -> None:
    assert interaction_for(kind) == interaction


@pytest.mark.parametrize("over", [dict(focus="https://x.example/fhir/Flag/f1"),
                                  dict(focus="Flag/f1/_history/2"), dict(focus="f1"),
                                  dict(additional_context=("Observation",)),
                                  dict(interaction="delete"), dict(number=0)])
def test_notification_event_refuses_bad_values(over: dict[str, Any]) -> None:
    fields: dict[str, Any] = dict(number=1, timestamp=NOW, focus="Flag/f1") | over
    with pytest.raises(ValueError):
        NotificationEvent(**fields)
