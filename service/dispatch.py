"""The outbox dispatcher: sends each subscription's queued notifications in order, with retries.

Per claimed subscription: take its pending rows in order; send each as its own notification; on a
failure schedule the retry with backoff and stop there (order is kept: nothing overtakes a row that
is waiting); after the last allowed attempt the subscription goes to ``error`` and keeps counting
events, to be fetched with ``$events`` or resumed when the client re-activates it. A handshake that
succeeds makes a ``requested`` subscription ``active``.

Delivery is at-least-once: a crash between the POST and recording it resends that row with its
number, and the subscriber drops the duplicate by number.
"""

from __future__ import annotations

import logging
import random
import uuid
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import httpx
import orjson
from sqlalchemy import select, update

from service.clock import Clock
from service.config import Settings
from service.db.engine import Database
from service.db.subscriptions import (
    claim_subscriptions,
    flag_version,
    load_spec,
    pending_events,
    record_attempt,
    release,
)
from service.db.tables import SubscriptionRecord
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

__all__ = ["Dispatcher", "subscription_state"]

log = logging.getLogger("lytestream.dispatch")
_S = SubscriptionRecord.__table__  # type: ignore[attr-defined]


def subscription_state(row: Any, base: str) -> SubscriptionState:
    spec = load_spec(row)
    errors = (ErrorNote(row.error),) if row.error else ()
    return SubscriptionState(id=row.id, topic=row.topic, status=row.status,
                             events_since_start=row.events_since_start, content=spec.content, form=spec.form,
                             base=base, errors=errors)


@dataclass
class Dispatcher:
    db: Database
    settings: Settings
    clock: Clock
    client: httpx.Client
    rng: random.Random
    owner: str = ""

    def __post_init__(self) -> None:
        self.owner = self.owner or uuid.uuid4().hex
        s = self.settings
        self.policy = RetryPolicy(base_s=s.delivery_base_seconds, cap_s=max(s.delivery_cap_seconds,
                                  s.delivery_base_seconds), max_attempts=s.delivery_max_attempts)

    def run_once(self) -> int:
        """Deliver what is due now; returns the notifications delivered."""
        now = self.clock.now()
        lease = timedelta(seconds=max(60.0, self.settings.delivery_timeout_seconds * 6))
        with self.db.session(write=True) as session:
            claimed = claim_subscriptions(session=session, owner=self.owner, now=now, lease=lease)
        sent = 0
        for sid in claimed:
            try:
                sent += self._drain(sid)
            finally:
                with self.db.session(write=True) as session:
                    release(session=session, subscription_id=sid, owner=self.owner)
        return sent

    def _drain(self, sid: str) -> int:
        sent = 0
        while True:
            with self.db.session() as session:
                sub = session.execute(select(_S).where(_S.c.id == sid)).one()
                rows = pending_events(session=session, subscription_id=sid, limit=50)
            if not rows:
                return sent
            spec = load_spec(sub)
            for row in rows:
                now = self.clock.now()
                if row.next_attempt_at > now:
                    return sent  # the head row waits for its retry: nothing overtakes it
                # Built just before sending, so the status it reports is the subscription's current one.
                with self.db.session() as session:
                    body = self._bundle(session, sub, row, now)
                outcome = deliver(self.client, endpoint=spec.endpoint, headers=spec.headers,
                                  content_type=spec.payload_mime, body=orjson.dumps(body),
                                  timeout_s=float(spec.timeout_s or self.settings.delivery_timeout_seconds))
                done = self.clock.now()
                decision = None if outcome.ok else next_attempt_at(
                    done, row.attempts + 1, policy=self.policy, rng=self.rng, retryable=outcome.retryable,
                    retry_after_s=outcome.retry_after_s)
                give_up = isinstance(decision, GiveUp)
                with self.db.session(write=True) as session:
                    record_attempt(session=session, event=row, ok=outcome.ok, status_code=outcome.status,
                                   error=outcome.error, elapsed_ms=outcome.elapsed_ms, now=done,
                                   next_at=None if decision is None or give_up else decision.at,  # type: ignore[union-attr]
                                   give_up=give_up)
                    self._after(session, sub, row, outcome.ok, give_up, outcome.error, done)
                log.info("delivery subscription=%s kind=%s ok=%s error=%s", sid, row.kind, outcome.ok,
                         outcome.error)
                if not outcome.ok:
                    return sent
                sent += 1
                sub = _reload(self.db, sid)
                if sub.status not in ("requested", "active"):
                    return sent

    def _after(self, session: Any, sub: Any, row: Any, ok: bool, give_up: bool, error: str | None,
               now: datetime) -> None:
        values: dict[str, Any] = {}
        if ok:
            values["last_sent_at"] = now
            if row.kind == "handshake" and sub.status == "requested":
                values |= {"status": "active", "error": None}
        elif give_up:
            values |= {"status": "error", "error": f"delivery failed ({error}) after {row.attempts + 1} attempt(s)"}
        if values:
            values |= {"version_id": _S.c.version_id + 1, "last_updated": now} if "status" in values else {}
            session.execute(update(_S).where(_S.c.id == sub.id).values(**values))

    def _bundle(self, session: Any, sub: Any, row: Any, now: datetime) -> dict[str, Any]:
        state = subscription_state(sub, self.settings.base_url)
        if row.kind == "handshake":
            return handshake(state, now=now)
        if row.kind == "heartbeat":
            return heartbeat(state, now=now)
        resource = flag_version(session=session, flag_id=row.focus_id, version=row.focus_version) \
            if state.content == "full-resource" else None
        event = NotificationEvent(number=row.number, timestamp=row.created_at, focus=f"Flag/{row.focus_id}",
                                  interaction=row.interaction or "update", version_id=str(row.focus_version),
                                  last_updated=row.created_at, resource=resource)
        return event_notification(state, [event], now=now)


def _reload(db: Database, sid: str) -> Any:
    with db.session() as session:
        return session.execute(select(_S).where(_S.c.id == sid)).one()
