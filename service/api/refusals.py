"""Refused requests (401, 403) leave a trace: a warning log line and a BALP-shaped AuditEvent, within limits.

A refusal is a security event: someone probing with a stale token, a misconfigured feed, a scan. It is
recorded like any interaction (who, from where, what kind of request, why it was refused) with no patient
data: the query string, the body and the token are never looked at. A flood must not be able to fill the
store or the log, so each client (or, when no token named one, each network address) gets
``refusal_audit_per_client`` records a minute and all of them together ``refusal_audit_overall``; past that
a refusal is only counted, and once its minute is over the count goes into one AuditEvent (detail
``suppressed``) and one log line. The count is handed over by the next refusal after the minute, so a flood
that stops entirely leaves its last minute's count in memory until the next one. Limits are per process.

Outcome: FHIR's audit-event-outcome code 4 ("minor failure", often equivalent to an HTTP 400 response) for
both 401 and 403. Both are the client's request failing as designed, not the server failing (8, "serious
failure", often an HTTP 500); ``outcomeDesc`` and the ``http-status`` detail tell the two apart.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

from fastapi import Request
from fastapi.concurrency import run_in_threadpool
from sqlalchemy.exc import SQLAlchemyError

from service.api.requester import request_id
from service.auth.failures import AuthFailure
from service.auth.principal import Principal
from service.clock import Clock
from service.db.audit import record_audit
from service.db.engine import Database
from service.fhir.audit_render import AuditFacts, Requester

__all__ = ["MAX_COUNTED_CALLERS", "UNAUTHENTICATED", "Admission", "RefusalAudit", "RefusalLimiter"]

log = logging.getLogger("lytestream.auth")

UNAUTHENTICATED = "(unauthenticated)"  # the agent of a 401: no token named a client (not a valid client name)
# Distinct callers counted one by one per window; beyond, they share one counter. This also bounds the count
# AuditEvents a closed window writes (one per caller), so many addresses cannot get round the overall limit.
MAX_COUNTED_CALLERS = 100
CallerKey = tuple[str, str]  # ("client", client id) or ("address", network address)
_OTHERS: CallerKey = ("others", "-")
_MAX_PATH = 200


@dataclass(frozen=True, slots=True)
class Admission:
    """What to do with one refusal: record it, note that its caller just went over the limit, and the
    counts of the window that closed before it (caller key → refusals counted, not recorded)."""

    record: bool
    first_over: bool
    closed_at: datetime | None = None
    closed: dict[CallerKey, int] = field(default_factory=dict)


class RefusalLimiter:
    """Fixed windows: the first ``per_key`` refusals of each key and ``overall`` in all are admitted.

    Thread-safe (the handler runs on the event loop, the tests on several threads); per process.
    """

    def __init__(self, *, per_key: int, overall: int, window: timedelta = timedelta(minutes=1)) -> None:
        self._per_key = per_key
        self._overall = overall
        self._window = window.total_seconds()
        self._lock = threading.Lock()
        self._start: datetime | None = None
        self._admitted: dict[CallerKey, int] = {}
        self._total = 0
        self._counted: dict[CallerKey, int] = {}

    def admit(self, key: CallerKey, now: datetime) -> Admission:
        start = datetime.fromtimestamp(now.timestamp() // self._window * self._window, UTC)
        with self._lock:
            closed_at, closed = None, {}
            if start != self._start:
                if self._counted and self._start is not None:
                    closed_at, closed = self._start, self._counted
                self._start, self._admitted, self._total, self._counted = start, {}, 0, {}
            if self._admitted.get(key, 0) < self._per_key and self._total < self._overall:
                self._admitted[key] = self._admitted.get(key, 0) + 1
                self._total += 1
                return Admission(True, False, closed_at, closed)
            if key not in self._counted and len(self._counted) >= MAX_COUNTED_CALLERS:
                key = _OTHERS
            self._counted[key] = self._counted.get(key, 0) + 1
            return Admission(False, self._counted[key] == 1, closed_at, closed)


class RefusalAudit:
    """The ``on_refused`` hook of :func:`service.auth.deps.install_auth`: log and audit, within limits."""

    def __init__(self, *, db: Database, clock: Clock, base_url: str, limiter: RefusalLimiter) -> None:
        self._db = db
        self._clock = clock
        self._base_url = base_url
        self._limiter = limiter

    async def __call__(self, request: Request, exc: AuthFailure) -> None:
        if exc.status not in (401, 403):
            log.warning("auth unavailable: status=%s reason=%s", exc.status, exc.description)
            return
        principal = getattr(request.state, "principal", None)
        client = principal.client_id if isinstance(principal, Principal) else None
        address = request.client.host if request.client else None
        key: CallerKey = ("client", client) if client else ("address", address or "-")
        now = self._clock.now()
        admission = self._limiter.admit(key, now)
        subtype, operation = _interaction(request)
        rid = request_id(request)
        events: list[tuple[AuditFacts, str | None]] = []
        if admission.record:
            log.warning("auth refused: status=%s error=%s client=%s interaction=%s request=%s reason=%s",
                        exc.status, exc.error or "-", client or UNAUTHENTICATED, operation or subtype, rid,
                        exc.description)
            who = Requester(client=client or UNAUTHENTICATED, address=address, request_id=rid)
            path = request.url.path[:_MAX_PATH]  # ids only; the query string may name a patient and is left out
            events.append((AuditFacts(
                subtype=subtype, operation=operation, recorded=now, requester=who, outcome="4", refused=True,
                outcome_desc=f"{exc.status}: {exc.description}",
                details={"http-status": str(exc.status), "request": f"{request.method} {path}",
                         "error": exc.error or "no-credentials"}), None))
        elif admission.first_over:
            log.warning("auth refusals over the limit: client=%s; counted, not recorded one by one, until the "
                        "minute is over", client or f"{UNAUTHENTICATED}@{address or '-'}")
        for (kind, name), count in sorted(admission.closed.items()):
            log.warning("auth refusals counted, not recorded: %s=%s count=%d minute=%s", kind, name, count,
                        admission.closed_at.isoformat() if admission.closed_at else "-")
            who = Requester(client=name if kind == "client" else UNAUTHENTICATED,
                            address=name if kind == "address" else None, request_id=rid)
            events.append((AuditFacts(
                subtype="operation", operation="$refusals", recorded=now, requester=who, outcome="4", refused=True,
                outcome_desc=f"{count} refused requests in the minute from "
                             f"{admission.closed_at.isoformat() if admission.closed_at else '-'} were counted, "
                             "not recorded one by one",
                details={"suppressed": str(count)}), None))
        if events:
            await run_in_threadpool(self._write, events)

    def _write(self, events: list[tuple[AuditFacts, str | None]]) -> None:
        try:
            with self._db.session(write=True) as session:
                record_audit(session=session, events=events, base_url=self._base_url)
        except SQLAlchemyError as exc:
            log.error("could not audit %d auth refusal(s): %s", len(events), type(exc).__name__)


def _interaction(request: Request) -> tuple[str, str | None]:
    """The restful interaction (and operation) the refused request was, from its route, not its data."""
    route = request.scope.get("route")
    template = getattr(route, "path", None) or request.url.path
    last = template.rstrip("/").rsplit("/", 1)[-1]
    if last.startswith("$"):
        return "operation", last
    method = request.method.upper()
    if method in ("GET", "HEAD"):
        if template.endswith("/_history/{vid}"):
            return "vread", None
        if template.endswith("/_history"):
            return "history-instance", None
        return ("read", None) if last.startswith("{") else ("search-type", None)
    if method == "POST":
        return ("transaction", None) if template.rstrip("/") == "/fhir" else ("create", None)
    return {"PUT": "update", "DELETE": "delete", "PATCH": "patch"}.get(method, "operation"), None
