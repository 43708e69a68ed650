"""Subscriptions and their outbox. Keyword-only, session first, never commits.

Event numbers are taken from the subscription row inside the transaction that writes the Flag
change, so numbers have no gaps and follow commit order per subscription. Delivery claims a
subscription with a lease: ``lease_owner`` holds a token fresh for each claim (a fencing token) and
``lease_until`` when the claim lapses. The holder renews the lease as it records each send, in a
transaction that locks the subscription row and first checks the token is still its own
(``hold_lease``), so a replica whose lease lapsed and was taken over records nothing more: one
replica at a time sends a subscription's rows, in number order.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Sequence
from datetime import datetime, timedelta
from typing import Any

import orjson
from sqlalchemy import and_, case, func, insert, or_, select, update
from sqlmodel import Session

from service.db.tables import DeliveryAttempt, FhirVersion, FlagRecord, SubscriptionEvent, SubscriptionRecord
from service.notify.topics import SubscriptionSpec, matches, parse_subscription

__all__ = [
    "DELETED",
    "WITHHELD",
    "keep_withheld_headers",
    "claim_subscriptions",
    "create_subscription",
    "enqueue_events",
    "delivery_trouble",
    "enqueue_heartbeats",
    "expedite_urgent",
    "hold_lease",
    "load_spec",
    "pending_events",
    "release",
    "served_subscription",
    "urgent_pending",
]

_S = SubscriptionRecord.__table__  # type: ignore[attr-defined]
_E = SubscriptionEvent.__table__  # type: ignore[attr-defined]
_A = DeliveryAttempt.__table__  # type: ignore[attr-defined]
_V = FhirVersion.__table__  # type: ignore[attr-defined]
_F = FlagRecord.__table__  # type: ignore[attr-defined]
# Internal status of a deleted subscription: never served (reads answer 410 Gone), never sent to, never counting.
DELETED = "deleted"
WITHHELD = "(withheld)"  # what a reader sees in place of a channel header's value
# Still counting while in error (the IG: keep incrementing eventsSinceSubscriptionStart).
_COUNTING = ("requested", "active", "error")


def load_spec(row: Any) -> SubscriptionSpec:
    spec = parse_subscription(orjson.loads(row.resource), allow_http=True)
    assert isinstance(spec, SubscriptionSpec), "a stored subscription was accepted once"
    return spec


def served_subscription(row: Any) -> dict[str, Any]:
    """The Subscription as we serve it: what was submitted, with our id, meta, status and error."""
    from service.fhir.render import fhir_instant

    body: dict[str, Any] = orjson.loads(row.resource)
    body["id"] = row.id
    body["meta"] = {"versionId": str(row.version_id), "lastUpdated": fhir_instant(row.last_updated)}
    body["status"] = row.status
    channel = body.get("channel") or {}
    if channel.get("header"):
        # Headers usually carry the subscriber's credentials: never echoed back to readers.
        channel["header"] = [f"{h.split(':', 1)[0]}: {WITHHELD}" for h in channel["header"]]
    if row.error:
        body["error"] = row.error
    else:
        body.pop("error", None)
    return body


def keep_withheld_headers(submitted: dict[str, Any], stored: dict[str, Any]) -> list[tuple[int, str]]:
    """Put the stored value back into each submitted header that carries the masked value, in place.

    A client that reads its subscription, changes something and PUTs it back sends ``Name: (withheld)``;
    that means "keep what you hold", never a new value. Returns (index, name) of masked headers no stored
    header of that name backs, which the caller refuses.
    """
    held = {}
    for h in (stored.get("channel") or {}).get("header") or []:
        name, _, value = h.partition(":")
        held[name.strip().lower()] = h
    headers = (submitted.get("channel") or {}).get("header")
    if not isinstance(headers, list):
        return []
    missing = []
    for i, h in enumerate(headers):
        if not isinstance(h, str):
            continue
        name, _, value = h.partition(":")
        if value.strip() != WITHHELD:
            continue
        if name.strip().lower() in held:
            headers[i] = held[name.strip().lower()]
        else:
            missing.append((i, name.strip()))
    return missing


def create_subscription(*, session: Session, resource: dict[str, Any], spec: SubscriptionSpec,
                        now: datetime, owner: str) -> Any:
    """Store a new subscription of client ``owner`` as ``requested`` and queue its handshake."""
    sid = str(uuid.uuid4())
    body = {k: v for k, v in resource.items() if k not in ("id", "meta", "status", "error")}
    session.execute(insert(_S).values(id=sid, status="requested", topic=spec.topic, resource=orjson.dumps(body),
                                      created_at=now, version_id=1, last_updated=now, events_since_start=0,
                                      owner_client=owner))
    queue_handshake(session=session, subscription_id=sid, now=now)
    return session.execute(select(_S).where(_S.c.id == sid)).one()


def queue_handshake(*, session: Session, subscription_id: str, now: datetime) -> None:
    session.execute(insert(_E).values(subscription_id=subscription_id, kind="handshake", created_at=now,
                                      next_attempt_at=now))


def enqueue_events(*, session: Session, topic: str, flags: Iterable[tuple[str, int, str, dict[str, Any]]],
                   now: datetime) -> int:
    """One numbered event per (subscription on ``topic``, matching flag version).

    ``flags`` holds (flag id, version, interaction, Flag JSON). Returns the rows written.
    """
    subs = session.execute(select(_S).where(_S.c.topic == topic, _S.c.status.in_(_COUNTING))
                           .order_by(_S.c.id).with_for_update()).all()
    if not subs:
        return 0
    written = 0
    items = list(flags)
    for sub in subs:
        spec = load_spec(sub)
        hits = [f for f in items if matches(spec, f[3])]
        if not hits:
            continue
        first = sub.events_since_start + 1
        rows = [{"subscription_id": sub.id, "number": first + i, "kind": "event-notification", "focus_id": fid,
                 "focus_version": vid, "interaction": interaction, "created_at": now, "next_attempt_at": now}
                for i, (fid, vid, interaction, _) in enumerate(hits)]
        session.execute(insert(_E), rows)
        session.execute(update(_S).where(_S.c.id == sub.id).values(events_since_start=first + len(hits) - 1))
        written += len(rows)
    return written


def enqueue_heartbeats(*, session: Session, now: datetime) -> int:
    """A heartbeat for each active subscription idle for its heartbeat period, with nothing queued."""
    queued = 0
    pending = {sid for (sid,) in session.execute(select(_E.c.subscription_id).where(_E.c.status == "pending"))}
    for sub in session.execute(select(_S).where(_S.c.status == "active")).all():
        period = load_spec(sub).heartbeat_period_s
        if not period or sub.id in pending:
            continue
        last = sub.last_sent_at or sub.created_at
        if now - last >= timedelta(seconds=period):
            session.execute(insert(_E).values(subscription_id=sub.id, kind="heartbeat", created_at=now,
                                              next_attempt_at=now))
            queued += 1
    return queued


def claim_subscriptions(*, session: Session, token: str, now: datetime, lease: timedelta,
                        limit: int | None = None) -> list[str]:
    """Lease to ``token`` (at most ``limit`` of) the subscriptions that have a due row and no live
    lease; returns their ids.

    The rows are locked in id order and rows another transaction has locked are skipped (PostgreSQL
    ``SKIP LOCKED``; SQLite has one writer anyway): an ingest numbering new events holds them for a
    moment, and the next pass claims them instead of queueing behind it or deadlocking with it.
    """
    # Due: every unsent row is due (a waiting retry holds back the rows behind it, so a replica
    # claiming such a subscription would only find it cannot send), or a handshake is due (it goes
    # first whatever waits).
    due = (select(_E.c.subscription_id).where(_E.c.status == "pending").group_by(_E.c.subscription_id)
           .having(or_(func.max(_E.c.next_attempt_at) <= now,
                       func.max(case((and_(_E.c.kind == "handshake", _E.c.next_attempt_at <= now), 1),
                                     else_=0)) == 1)))
    free = (select(_S.c.id)
            .where(_S.c.id.in_(due), _S.c.status.in_(("requested", "active")),
                   or_(_S.c.lease_until.is_(None), _S.c.lease_until < now))
            .order_by(_S.c.id).limit(limit).with_for_update(skip_locked=True))
    ids = [r[0] for r in session.execute(free)]
    if ids:
        session.execute(update(_S).where(_S.c.id.in_(ids)).values(lease_owner=token, lease_until=now + lease))
    return ids


def hold_lease(*, session: Session, subscription_id: str, token: str, until: datetime,
               values: dict[str, Any] | None = None) -> Any | None:
    """If ``token`` still holds the subscription's lease, extend it to ``until`` and set ``values``.

    One conditional UPDATE: it locks the row, and a claim that committed meanwhile makes its
    condition false. Returns the row as updated, or None when the lease has passed to another claim:
    the caller must then record nothing, since the new holder owns the subscription's rows.
    """
    return session.execute(update(_S).where(_S.c.id == subscription_id, _S.c.lease_owner == token)
                           .values(lease_until=until, **(values or {})).returning(*_S.c)).first()


def _urgent(subscription_id: Any) -> Any:
    """There is an unsent event of this subscription about a high-priority Flag."""
    e = _E.alias("urgent_event")
    return (select(e.c.id).join(_F, _F.c.id == e.c.focus_id)
            .where(e.c.subscription_id == subscription_id, e.c.status == "pending", _F.c.priority == "high")
            .exists())


def urgent_pending(*, session: Session, subscription_id: str) -> bool:
    """Whether a high-priority Flag's notification is among the subscription's unsent rows."""
    return bool(session.execute(select(_urgent(subscription_id))).scalar())


def expedite_urgent(*, session: Session, by: datetime) -> int:
    """Bring every retry scheduled after ``by`` forward to ``by`` where a high-priority Flag's
    notification waits behind it; returns the rows changed.

    Only rows that failed before are waiting; a high-priority event queued behind a row whose
    backoff has grown long would otherwise wait out that backoff too (nothing overtakes).
    """
    result = session.execute(update(_E).where(_E.c.status == "pending", _E.c.attempts > 0, _E.c.next_attempt_at > by,
                                              _urgent(_E.c.subscription_id))
                             .values(next_attempt_at=by))
    return int(result.rowcount or 0)  # type: ignore[attr-defined]


def release(*, session: Session, subscription_id: str, token: str) -> None:
    session.execute(update(_S).where(_S.c.id == subscription_id, _S.c.lease_owner == token)
                    .values(lease_owner=None, lease_until=None))


def pending_events(*, session: Session, subscription_id: str, limit: int = 100) -> Sequence[Any]:
    """The subscription's unsent rows in order (handshake first, then by number)."""
    # A handshake goes first even when older events wait (a client re-activating after an error).
    handshake_first = case((_E.c.kind == "handshake", 0), else_=1)
    return session.execute(select(_E).where(_E.c.subscription_id == subscription_id, _E.c.status == "pending")
                           .order_by(handshake_first, _E.c.id).limit(limit)).all()


def record_attempt(*, session: Session, event: Any, ok: bool, status_code: int | None, error: str | None,
                   elapsed_ms: int, now: datetime, next_at: datetime | None, give_up: bool) -> None:
    session.execute(insert(_A).values(event_id=event.id, subscription_id=event.subscription_id, at=now, ok=ok,
                                      status_code=status_code, error=error, elapsed_ms=elapsed_ms))
    values: dict[str, Any] = {"attempts": event.attempts + 1, "last_error": error}
    if ok:
        values |= {"status": "sent", "sent_at": now}
    elif give_up:
        values |= {"status": "failed"}
    elif next_at is not None:
        values |= {"next_attempt_at": next_at}
    session.execute(update(_E).where(_E.c.id == event.id).values(**values))


def delivery_trouble(*, session: Session, subscription_id: str) -> Any | None:
    """The oldest unsent row that has already failed: its kind, attempts, last error and next try; None
    when nothing queued has failed (the pending-rows index covers the scan)."""
    return session.execute(select(_E.c.kind, _E.c.attempts, _E.c.last_error, _E.c.next_attempt_at)
                           .where(_E.c.status == "pending", _E.c.subscription_id == subscription_id,
                                  _E.c.attempts > 0).order_by(_E.c.id).limit(1)).first()


def events_between(*, session: Session, subscription_id: str, since: int | None, until: int | None) -> Sequence[Any]:
    conds = [_E.c.subscription_id == subscription_id, _E.c.number.is_not(None)]
    if since is not None:
        conds.append(_E.c.number >= since)
    if until is not None:
        conds.append(_E.c.number <= until)
    return session.execute(select(_E).where(and_(*conds)).order_by(_E.c.number)).all()


def flag_version(*, session: Session, flag_id: str, version: int) -> dict[str, Any] | None:
    row = session.execute(select(_V.c.resource).where(_V.c.resource_type == "Flag", _V.c.id == flag_id,
                                                      _V.c.version_id == version)).first()
    return orjson.loads(row[0]) if row else None
