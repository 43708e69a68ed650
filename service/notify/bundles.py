"""Notification, ``$status`` and ``$events`` Bundles (Subscriptions R5 Backport IG). Pure.

Two forms of the status entry, chosen per subscription (``channel.payload; fhirVersion=``):

* FORM_R4 — ``entry[0]`` is a ``Parameters`` (profile backport-subscription-status-r4) inside a Bundle
  of profile backport-subscription-notification-r4. Our default: our subscribers are R4 systems.
* FORM_R4B — ``entry[0]`` is an R4B ``SubscriptionStatus`` (profile backport-subscription-notification).

Both carry ``eventsSinceSubscriptionStart`` and each ``eventNumber`` as *strings* (the IG types them
string so they can exceed a 32-bit integer). Notification Bundles are ``history`` Bundles, so every
entry has ``request`` and ``response`` (FHIR R4 bdl-3, bdl-4); ``entry[0]`` is the GET of
``Subscription/[id]/$status`` (IG notifications page). Payload content decides the other entries:
``empty`` none and no focus, ``id-only`` ``fullUrl`` + ``request`` + ``response``, ``full-resource`` also
the ``resource``.

``$status`` answers a ``searchset`` Bundle of status resources of type ``query-status``, one per
subscription (IG OperationDefinition backport-subscription-status: "The Bundle type is searchset").
``$events`` answers a notification Bundle — ``history``, status type ``query-event`` — holding the
requested events (IG OperationDefinition backport-subscription-events: "a valid notification bundle
... The bundle type is history").
"""

from __future__ import annotations

import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from service.fhir.render import fhir_instant, status_line
from service.notify.topics import BACKPORT_SD, CONTENT_CODES, FORM_R4, FORM_R4B

__all__ = [
    "ErrorNote",
    "NotificationEvent",
    "SUBSCRIPTION_ERROR_SYSTEM",
    "SubscriptionState",
    "event_notification",
    "events_response",
    "handshake",
    "heartbeat",
    "interaction_for",
    "status_response",
]

SUBSCRIPTION_ERROR_SYSTEM = "http://terminology.hl7.org/CodeSystem/subscription-error"
_STATUS_R4_PROFILE = f"{BACKPORT_SD}/backport-subscription-status-r4"
_BUNDLE_PROFILE = {
    FORM_R4: f"{BACKPORT_SD}/backport-subscription-notification-r4",
    FORM_R4B: f"{BACKPORT_SD}/backport-subscription-notification",
}
# What each write kind of a Flag version was, as a FHIR interaction (FlagWrite.kind → request method).
_INTERACTION = {"create": "create", "reactivate": "update", "update": "update", "close": "update",
                "withdraw": "update"}


@dataclass(frozen=True, slots=True)
class ErrorNote:
    """One ``error`` of a subscription; ``code`` from SUBSCRIPTION_ERROR_SYSTEM when there is one."""

    text: str
    code: str | None = None


@dataclass(frozen=True, slots=True)
class SubscriptionState:
    """What every status resource reports about one subscription at one moment."""

    id: str
    topic: str
    status: str  # requested | active | error | off
    events_since_start: int  # real events so far, inclusive; never counts handshakes or heartbeats
    content: str  # empty | id-only | full-resource
    form: str  # FORM_R4 | FORM_R4B
    base: str  # our FHIR base URL, for absolute references
    errors: tuple[ErrorNote, ...] = ()

    def __post_init__(self) -> None:
        if self.content not in CONTENT_CODES:
            raise ValueError(f"content must be one of {CONTENT_CODES}")
        if self.form not in (FORM_R4, FORM_R4B):
            raise ValueError("form must be FORM_R4 or FORM_R4B")
        if self.events_since_start < 0:
            raise ValueError("events_since_start must not be negative")


@dataclass(frozen=True, slots=True)
class NotificationEvent:
    """One numbered event: a Flag version. ``resource`` is needed only for full-resource content."""

    number: int
    timestamp: datetime
    focus: str  # relative reference of the focus, e.g. "Flag/abc"
    interaction: str = "update"  # create | update — how the focus came to be (see interaction_for)
    version_id: str | None = None
    last_updated: datetime | None = None
    resource: Mapping[str, Any] | None = None
    additional_context: tuple[str, ...] = field(default=())  # relative references, status only

    def __post_init__(self) -> None:
        for ref in (self.focus, *self.additional_context):
            rtype, slash, rid = ref.partition("/")
            if not slash or not rtype or not rid or "/" in rid:
                raise ValueError("references must be relative 'Type/id' (no base, no history)")
        if self.interaction not in ("create", "update"):
            raise ValueError("interaction must be create or update")
        if self.number < 1:
            raise ValueError("event numbers start at 1")


def interaction_for(kind: str) -> str:
    """A FlagWrite kind (create | reactivate | update | close | withdraw) → create | update."""
    return _INTERACTION[kind]


IdFactory = Callable[[], str]


def _new_id() -> str:
    return str(uuid.uuid4())


def handshake(state: SubscriptionState, *, now: datetime, new_id: IdFactory = _new_id) -> dict[str, Any]:
    """The handshake sent when a subscription is requested; 2xx from the endpoint activates it."""
    return _notification(state, "handshake", (), now=now, new_id=new_id)


def heartbeat(state: SubscriptionState, *, now: datetime, new_id: IdFactory = _new_id) -> dict[str, Any]:
    """The keep-alive sent every heartbeat period while idle."""
    return _notification(state, "heartbeat", (), now=now, new_id=new_id)


def event_notification(
    state: SubscriptionState,
    events: Sequence[NotificationEvent],
    *,
    now: datetime,
    new_id: IdFactory = _new_id,
) -> dict[str, Any]:
    """An event-notification Bundle for ``events`` (at least one)."""
    if not events:
        raise ValueError("an event-notification needs at least one event")
    return _notification(state, "event-notification", events, now=now, new_id=new_id)


def events_response(
    state: SubscriptionState,
    events: Sequence[NotificationEvent],
    *,
    now: datetime,
    content: str | None = None,
    new_id: IdFactory = _new_id,
) -> dict[str, Any]:
    """The ``$events`` answer: a history notification Bundle of type query-event (may hold no events).

    ``content`` is the caller's hint (IG: "MAY be ignored"); we honour it, since the caller is already
    authorised to read the subscription.
    """
    if content is not None and content not in CONTENT_CODES:
        raise ValueError(f"content must be one of {CONTENT_CODES}")
    shown = state if content is None else _replace_content(state, content)
    return _notification(shown, "query-event", events, now=now, new_id=new_id)


def status_response(
    states: Sequence[SubscriptionState], *, now: datetime, new_id: IdFactory = _new_id
) -> dict[str, Any]:
    """The ``$status`` answer: a searchset of query-status resources, one per subscription."""
    entries = []
    for s in states:
        rid = new_id()
        entries.append({"fullUrl": f"urn:uuid:{rid}", "resource": _status(s, "query-status", (), rid),
                        "search": {"mode": "match"}})
    return {"resourceType": "Bundle", "id": new_id(), "type": "searchset", "timestamp": fhir_instant(now),
            "total": len(entries), "entry": entries}


# ---- building blocks --------------------------------------------------------------------------------


def _replace_content(state: SubscriptionState, content: str) -> SubscriptionState:
    return SubscriptionState(state.id, state.topic, state.status, state.events_since_start, content,
                             state.form, state.base, state.errors)


def _notification(
    state: SubscriptionState, kind: str, events: Sequence[NotificationEvent], *, now: datetime,
    new_id: IdFactory,
) -> dict[str, Any]:
    rid = new_id()
    entries: list[dict[str, Any]] = [{
        "fullUrl": f"urn:uuid:{rid}",
        "resource": _status(state, kind, events, rid),
        "request": {"method": "GET", "url": f"{state.base}/Subscription/{state.id}/$status"},
        "response": {"status": status_line(200)},
    }]
    if state.content != "empty":
        entries.extend(_focus_entry(state, e) for e in events)
    return {
        "resourceType": "Bundle",
        "id": new_id(),
        "meta": {"profile": [_BUNDLE_PROFILE[state.form]]},
        "type": "history",
        "timestamp": fhir_instant(now),
        "entry": entries,
    }


def _focus_entry(state: SubscriptionState, e: NotificationEvent) -> dict[str, Any]:
    rtype, _, rid = e.focus.partition("/")
    if e.interaction == "create":
        request, response = {"method": "POST", "url": rtype}, {"status": status_line(201)}
    else:
        request, response = {"method": "PUT", "url": e.focus}, {"status": status_line(200)}
    response["location"] = f"{e.focus}/_history/{e.version_id}" if e.version_id else e.focus
    if e.version_id:
        response["etag"] = f'W/"{e.version_id}"'
    if e.last_updated is not None:
        response["lastModified"] = fhir_instant(e.last_updated)
    # fullUrl is never version-specific (FHIR R4 bdl-8); the version travels in response.etag.
    entry: dict[str, Any] = {"fullUrl": f"{state.base}/{rtype}/{rid}", "request": request,
                             "response": response}
    if state.content == "full-resource":
        if e.resource is None:
            raise ValueError(f"full-resource content needs the resource of event {e.number}")
        entry["resource"] = dict(e.resource)
    return entry


def _status(
    state: SubscriptionState, kind: str, events: Sequence[NotificationEvent], rid: str
) -> dict[str, Any]:
    # Backport IG: focus SHALL NOT appear with empty content and SHALL with id-only / full-resource;
    # topic SHOULD NOT appear with empty content.
    with_focus = state.content != "empty"
    if state.form == FORM_R4B:
        return _status_r4b(state, kind, events, rid, with_focus)
    return _status_r4(state, kind, events, rid, with_focus)


def _error_concept(e: ErrorNote) -> dict[str, Any]:
    concept: dict[str, Any] = {"text": e.text}
    if e.code:
        concept["coding"] = [{"system": SUBSCRIPTION_ERROR_SYSTEM, "code": e.code}]
    return concept


def _status_r4(
    state: SubscriptionState, kind: str, events: Sequence[NotificationEvent], rid: str, with_focus: bool
) -> dict[str, Any]:
    """Parameters per backport-subscription-status-r4 (parameter names are the profile's slice names)."""
    params: list[dict[str, Any]] = [
        {"name": "subscription", "valueReference": {"reference": f"{state.base}/Subscription/{state.id}"}},
    ]
    if with_focus:
        params.append({"name": "topic", "valueCanonical": state.topic})
    params += [
        {"name": "status", "valueCode": state.status},
        {"name": "type", "valueCode": kind},
        {"name": "events-since-subscription-start", "valueString": str(state.events_since_start)},
    ]
    for e in events:
        parts: list[dict[str, Any]] = [
            {"name": "event-number", "valueString": str(e.number)},
            {"name": "timestamp", "valueInstant": fhir_instant(e.timestamp)},
        ]
        if with_focus:
            parts.append({"name": "focus", "valueReference": {"reference": f"{state.base}/{e.focus}"}})
            parts += [{"name": "additional-context", "valueReference": {"reference": f"{state.base}/{c}"}}
                      for c in e.additional_context]
        params.append({"name": "notification-event", "part": parts})
    params += [{"name": "error", "valueCodeableConcept": _error_concept(x)} for x in state.errors]
    return {"resourceType": "Parameters", "id": rid, "meta": {"profile": [_STATUS_R4_PROFILE]},
            "parameter": params}


def _status_r4b(
    state: SubscriptionState, kind: str, events: Sequence[NotificationEvent], rid: str, with_focus: bool
) -> dict[str, Any]:
    """An R4B SubscriptionStatus (counts as strings: R4B types them string)."""
    out: dict[str, Any] = {
        "resourceType": "SubscriptionStatus",
        "id": rid,
        "status": state.status,
        "type": kind,
        "eventsSinceSubscriptionStart": str(state.events_since_start),
        "subscription": {"reference": f"{state.base}/Subscription/{state.id}"},
    }
    if with_focus:
        out["topic"] = state.topic
    notified = []
    for e in events:
        item: dict[str, Any] = {"eventNumber": str(e.number), "timestamp": fhir_instant(e.timestamp)}
        if with_focus:
            item["focus"] = {"reference": f"{state.base}/{e.focus}"}
            if e.additional_context:
                item["additionalContext"] = [{"reference": f"{state.base}/{c}"} for c in e.additional_context]
        notified.append(item)
    if notified:
        out["notificationEvent"] = notified
    if state.errors:
        out["error"] = [_error_concept(x) for x in state.errors]
    return out
