"""The outbox dispatcher: sends each subscription's queued notifications in order, with retries.

Per claimed subscription: take its pending rows in order; send each as its own notification; on a
failure schedule the retry with backoff and stop there (order is kept: nothing overtakes a row that
is waiting); after the last allowed attempt the subscription goes to ``error`` and keeps counting
events, to be fetched with ``$events`` or resumed when the client re-activates it. A handshake that
succeeds makes a ``requested`` subscription ``active``.

Replicas share the work through leases (``service.db.subscriptions``). A send starts only while the
lease outlasts the send's timeout by ``_SEND_ROOM``, so the holder is still the holder when the answer
comes back; recording the answer re-checks the lease's token under a row lock and renews it. A pass
works round-robin, ``_BATCH`` rows per subscription per round, claiming one more subscription every
round: one busy subscription does not hold up the others, replicas share the subscriptions, and a
crashed replica's subscriptions are picked up within a round once its leases lapse (the lease, at
least the send timeout + 2 s, bounds that wait).

While a high-priority Flag's notification is queued, retries follow the urgent schedule (no wait
above ``delivery_urgent_cap_seconds``), and a retry already scheduled further out is brought
forward to it: once the endpoint is back, the page goes out within that cap plus a pass.

Delivery is at-least-once: a crash between the POST and recording it resends that row with its
number, and the subscriber drops the duplicate by number.
"""

from __future__ import annotations

import logging
import os
import random
import socket
import time
import uuid
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any
from urllib.parse import urlsplit

import httpx
import orjson
from sqlalchemy import case, select
from sqlmodel import Session

from service.clock import Clock
from service.config import Settings
from service.db.audit import record_audit
from service.db.engine import Database
from service.db.reads import patient_key_for
from service.db.subscriptions import (
    claim_subscriptions,
    expedite_urgent,
    flag_version,
    hold_lease,
    load_spec,
    pending_events,
    record_attempt,
    release,
    urgent_pending,
)
from service.db.tables import SubscriptionRecord
from service.fhir.audit_render import AuditFacts, Requester
from service.fhir.references import served_subject_alias
from service.notify.backoff import GiveUp, RetryPolicy, next_attempt_at
from service.notify.bundles import (
    ErrorNote,
    NotificationEvent,
    SubscriptionState,
    event_notification,
    handshake,
    heartbeat,
)
from service.notify.sender import deliver
from service.ops.metrics import DELIVERY_ATTEMPTS

__all__ = ["Dispatcher", "subscription_state"]

log = logging.getLogger("lytestream.dispatch")
_S = SubscriptionRecord.__table__  # type: ignore[attr-defined]


def subscription_state(row: Any, base: str, trouble: Any | None = None) -> SubscriptionState:
    """``trouble``: the failing head row (``delivery_trouble``); while the subscription is still requested
    or active it is reported as an error, so a dead endpoint shows before the subscription gives up."""
    spec = load_spec(row)
    errors: tuple[ErrorNote, ...] = (ErrorNote(row.error),) if row.error else ()
    if trouble is not None and row.status in ("requested", "active"):
        errors += (ErrorNote(f"{trouble.kind} delivery failing: {trouble.attempts} attempt(s) failed, the last with "
                             f"{trouble.last_error}; next attempt at {_iso(trouble.next_attempt_at)}"),)
    return SubscriptionState(id=row.id, topic=row.topic, status=row.status,
                             events_since_start=row.events_since_start, content=spec.content, form=spec.form,
                             base=base, errors=errors)


def _iso(at: datetime) -> str:
    return at.isoformat().replace("+00:00", "Z")


# A send starts only if the lease outlasts its timeout by this much: room to record the answer, and
# for a little clock difference between replicas (their clocks are assumed NTP-synchronised).
_SEND_ROOM = timedelta(seconds=1)
_BATCH = 20  # rows per subscription per round
# New claims per round. One: a replica that is already busy leaves the rest to replicas that are
# idle (their scheduler ticks fall between its rounds), instead of taking every due subscription
# at once and keeping the others out.
_CLAIMS_PER_ROUND = 1
_PASS_SECONDS = 5.0  # a pass stops starting new rounds after this (the scheduler runs it again)


@dataclass
class _Lease:
    token: str
    until: datetime


@dataclass
class Dispatcher:
    db: Database
    settings: Settings
    clock: Clock
    client: httpx.Client
    rng: random.Random
    owner: str = ""

    def __post_init__(self) -> None:
        # Host and process first, so an operator (or a drill) can tell which replica holds a lease.
        self.owner = self.owner or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        s = self.settings
        self.policy = RetryPolicy(base_s=s.delivery_base_seconds, cap_s=max(s.delivery_cap_seconds,
                                  s.delivery_base_seconds), max_attempts=s.delivery_max_attempts,
                                  urgent_cap_s=s.delivery_urgent_cap_seconds)

    def _hold(self, timeout_s: float) -> timedelta:
        """How long a lease is taken or renewed for: the setting, but always enough for one send."""
        # Twice the room: the renewal made while recording one send then covers the next one too.
        return max(timedelta(seconds=self.settings.delivery_lease_seconds),
                   timedelta(seconds=timeout_s) + 2 * _SEND_ROOM)

    def run_once(self) -> int:
        """Deliver what is due now; returns the notifications delivered."""
        held: dict[str, _Lease] = {}
        sent = 0
        stop_at = time.monotonic() + _PASS_SECONDS
        try:
            while True:
                claimed = self._claim(held)
                if not held:
                    return sent
                progressed = False
                for sid in sorted(held):
                    n, more = self._send_batch(sid, held[sid])
                    sent += n
                    progressed = progressed or n > 0
                    if not more:
                        self._release(sid, held.pop(sid))
                if not (progressed or claimed) or time.monotonic() >= stop_at:
                    return sent
        finally:
            for sid, lease in held.items():
                self._release(sid, lease)

    def _claim(self, held: dict[str, _Lease]) -> int:
        """Claim up to ``_CLAIMS_PER_ROUND`` more subscriptions into ``held``; returns how many."""
        now = self.clock.now()
        token = f"{self.owner}:{uuid.uuid4().hex[:12]}"  # fresh per claim: the fencing token
        hold = self._hold(self.settings.delivery_timeout_seconds)
        with self.db.session(write=True) as session:
            expedite_urgent(session=session, by=now + timedelta(seconds=self.policy.cap(urgent=True)))
            claimed = claim_subscriptions(session=session, token=token, now=now, lease=hold,
                                          limit=_CLAIMS_PER_ROUND)
        for sid in claimed:
            held[sid] = _Lease(token, now + hold)
        return len(claimed)

    def _release(self, sid: str, lease: _Lease) -> None:
        with self.db.session(write=True) as session:
            release(session=session, subscription_id=sid, token=lease.token)

    def _renew(self, sid: str, lease: _Lease, hold: timedelta) -> bool:
        now = self.clock.now()
        with self.db.session(write=True) as session:
            ok = hold_lease(session=session, subscription_id=sid, token=lease.token, until=now + hold) is not None
        if ok:
            lease.until = now + hold
        return ok

    def _send_batch(self, sid: str, lease: _Lease) -> tuple[int, bool]:
        """Send up to ``_BATCH`` due rows in order; returns (sent, whether more may be due now)."""
        with self.db.session() as session:
            sub = session.execute(select(_S).where(_S.c.id == sid)).one()
            rows = pending_events(session=session, subscription_id=sid, limit=_BATCH)
        spec = load_spec(sub)
        timeout_s = float(spec.timeout_s or self.settings.delivery_timeout_seconds)
        hold = self._hold(timeout_s)
        sent = 0
        prior_status = sub.status
        for row in rows:
            now = self.clock.now()
            if row.next_attempt_at > now:
                return sent, False  # the head row waits for its retry: nothing overtakes it
            if lease.until - now < timedelta(seconds=timeout_s) + _SEND_ROOM and not self._renew(sid, lease, hold):
                log.warning("delivery subscription=%s lease lost before sending; another replica has it", sid)
                return sent, False
            # Built just before sending, so the status it reports is the subscription's current one.
            body, disclosed = self._bundle(sub, row, now)
            outcome = deliver(self.client, endpoint=spec.endpoint, headers=spec.headers,
                              content_type=spec.payload_mime, body=orjson.dumps(body), timeout_s=timeout_s)
            done = self.clock.now()
            with self.db.session(write=True) as session:
                decision = None if outcome.ok else next_attempt_at(
                    done, row.attempts + 1, policy=self.policy, rng=self.rng, retryable=outcome.retryable,
                    retry_after_s=outcome.retry_after_s, urgent=urgent_pending(session=session, subscription_id=sid))
                give_up = isinstance(decision, GiveUp)
                current = hold_lease(session=session, subscription_id=sid, token=lease.token, until=done + hold,
                                     values=_after(row, outcome.ok, give_up, outcome.error, done))
                if current is not None:
                    record_attempt(session=session, event=row, ok=outcome.ok, status_code=outcome.status,
                                   error=outcome.error, elapsed_ms=outcome.elapsed_ms, now=done,
                                   next_at=None if decision is None or give_up else decision.at,  # type: ignore[union-attr]
                                   give_up=give_up)
                    if disclosed is not None and outcome.status is not None:
                        # The receiver answered, so it has the Flag, whatever its answer said.
                        self._audit_disclosure(session, current, spec.endpoint, disclosed, outcome.ok, done)
                    sub = current  # as of this lock: the next notification reports the current count
            if current is None:
                # Taken over while this send was out (a pause longer than the room left): the new holder
                # owns the row now and will send it again; recording it here could break its order.
                log.warning("delivery subscription=%s lease lost during a send; not recorded", sid)
                return sent, False
            lease.until = done + hold
            word = "ok" if outcome.ok else ("gave-up" if give_up else "retry")
            DELIVERY_ATTEMPTS.labels(row.kind, word).inc()
            log.log(logging.INFO if outcome.ok else logging.WARNING, "delivery attempt", extra={
                "subscription": sid, "kind": row.kind, "number": row.number, "outcome": word,
                "error": outcome.error, "http_status": outcome.status, "attempt": row.attempts + 1,
                "elapsed_ms": outcome.elapsed_ms,
                "next_attempt_at": None if decision is None or give_up else decision.at.isoformat()})  # type: ignore[union-attr]
            if current.status != prior_status:
                (log.warning if current.status == "error" else log.info)(
                    "subscription state", extra={"subscription": sid, "from": prior_status, "to": current.status,
                                                 "error": current.error})
            prior_status = current.status
            if not outcome.ok:
                return sent, False
            sent += 1
            if sub.status not in ("requested", "active"):
                return sent, False
        return sent, len(rows) == _BATCH

    def _bundle(self, sub: Any, row: Any, now: datetime) -> tuple[dict[str, Any], dict[str, Any] | None]:
        """The notification, and the Flag it carries when its content is full-resource."""
        state = subscription_state(sub, self.settings.base_url)
        if row.kind == "handshake":
            return handshake(state, now=now), None
        if row.kind == "heartbeat":
            return heartbeat(state, now=now), None
        resource = None
        if state.content == "full-resource":
            with self.db.session() as session:
                resource = flag_version(session=session, flag_id=row.focus_id, version=row.focus_version)
        event = NotificationEvent(number=row.number, timestamp=row.created_at, focus=f"Flag/{row.focus_id}",
                                  interaction=row.interaction or "update", version_id=str(row.focus_version),
                                  last_updated=row.created_at, resource=resource)
        return event_notification(state, [event], now=now), resource

    def _audit_disclosure(self, session: Session, sub: Any, endpoint: str, flag: dict[str, Any], ok: bool,
                          now: datetime) -> None:
        parts = urlsplit(endpoint)
        who = Requester(client=sub.owner_client or "unknown", address=f"{parts.scheme}://{parts.netloc}",
                        request_id="")
        facts = AuditFacts(subtype="disclose", recorded=now, requester=who, patient=flag["subject"],
                           what=[f"Flag/{flag['id']}/_history/{flag['meta']['versionId']}", f"Subscription/{sub.id}"],
                           outcome="0" if ok else "4",
                           outcome_desc=None if ok else "the receiver did not accept the notification")
        key = patient_key_for(session=session, alias=served_subject_alias(flag["subject"]))
        record_audit(session=session, events=[(facts, key)],
                     base_url=self.settings.base_url)


def _after(row: Any, ok: bool, give_up: bool, error: str | None, now: datetime) -> dict[str, Any]:
    """What a send changes on the subscription row, besides its lease."""
    if ok and row.kind == "handshake":
        # In SQL, so that only a subscription still ``requested`` becomes active (a new version).
        requested = _S.c.status == "requested"
        return {"last_sent_at": now,
                "status": case((requested, "active"), else_=_S.c.status),
                "error": case((requested, None), else_=_S.c.error),
                "version_id": case((requested, _S.c.version_id + 1), else_=_S.c.version_id),
                "last_updated": case((requested, now), else_=_S.c.last_updated)}
    if ok:
        return {"last_sent_at": now}
    if give_up:
        return {"status": "error", "error": f"delivery failed ({error}) after {row.attempts + 1} attempt(s)",
                "version_id": _S.c.version_id + 1, "last_updated": now}
    return {}
