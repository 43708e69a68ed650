"""Subscriptions (R5 Backport on R4): create, read, search, update, delete, $status and $events.

A subscription belongs to the client that created it: another client may not see, change, stop, or fetch
the events of it unless its token holds ``lytestream/admin``. A full-resource payload carries Flags, so
creating one, switching to one, or fetching events as full resources also needs ``system/Flag.r``; an id-only
subscriber needs that scope when it reads the Flags named (``GET Flag/{id}`` checks it).
"""

from __future__ import annotations

from typing import Any

import orjson
from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response
from sqlalchemy import select, update
from sqlmodel import Session

from service.api.context import AppContext, ContextDep
from service.api.fhir_io import fhir_response, read_json
from service.api.requester import RequesterDep
from service.auth.deps import require
from service.auth.failures import forbidden, not_owner
from service.auth.principal import Principal
from service.auth.scopes import ADMIN_SCOPE, needed_scope
from service.db.audit import record_audit
from service.db.subscriptions import (
    create_subscription,
    events_between,
    flag_version,
    queue_handshake,
    served_subscription,
)
from service.db.tables import SubscriptionEvent, SubscriptionRecord
from service.dispatch import subscription_state
from service.errors import Issue, NotFound, RequestRejected
from service.fhir.audit_render import AuditFacts, Requester
from service.fhir.render import searchset
from service.notify.bundles import NotificationEvent, events_response, status_response
from service.notify.topics import CONTENT_CODES, SubscriptionSpec, parse_subscription

router = APIRouter()
_S = SubscriptionRecord.__table__  # type: ignore[attr-defined]
_E = SubscriptionEvent.__table__  # type: ignore[attr-defined]


def _spec(ctx: AppContext, body: Any) -> SubscriptionSpec:
    if not isinstance(body, dict) or body.get("resourceType") != "Subscription":
        raise RequestRejected([Issue("invalid", "this endpoint takes a Subscription", ("Subscription",))])
    parsed = parse_subscription(body, allow_http=ctx.settings.allow_http_endpoints)
    if isinstance(parsed, list):
        raise RequestRejected([Issue(i.code, i.message, i.expression, i.severity, 422 if i.status == 400 else i.status)
                               for i in parsed])
    return parsed


def _audit(ctx: AppContext, session: Session, who: Requester, subtype: str, sid: str, version: int) -> None:
    facts = AuditFacts(subtype=subtype, recorded=ctx.clock.now(), requester=who,
                       what=[f"Subscription/{sid}/_history/{version}"])
    record_audit(session=session, events=[(facts, None)], base_url=ctx.settings.base_url)


def _row(session: Session, sid: str) -> Any:
    row = session.execute(select(_S).where(_S.c.id == sid)).first()
    if row is None:
        raise NotFound(f"Subscription/{sid} is not held here")
    return row


def _caller(who: Requester) -> Principal:
    principal = who.principal
    if not isinstance(principal, Principal):
        # Fail closed: every route here is authenticated, so this is wiring gone wrong, not a caller to trust.
        raise RuntimeError("subscription route reached without an authenticated caller")
    return principal


def _owned_row(session: Session, sid: str, who: Requester) -> Any:
    """The subscription, if the caller made it or holds the admin scope; 403 otherwise (404 if not held)."""
    row = _row(session, sid)
    if not _caller(who).admin and (row.owner_client is None or row.owner_client != who.client):
        raise not_owner(f"Subscription/{sid}", ADMIN_SCOPE)
    return row


def _may_carry_flags(who: Requester, content: str) -> None:
    """A full-resource payload hands out Flags: the caller must be allowed to read Flags itself."""
    if content == "full-resource" and not _caller(who).allows("Flag", "r"):
        raise forbidden(needed_scope("Flag", "r"), "a full-resource payload carries Flag resources")


@router.post("/fhir/Subscription", dependencies=[Depends(require("Subscription", "c"))])
async def create(request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    body, _ = await read_json(request, max_bytes=ctx.settings.max_body_bytes)
    spec = _spec(ctx, body)
    _may_carry_flags(who, spec.content)

    def run() -> dict[str, Any]:
        with ctx.db.session(write=True) as session:
            row = create_subscription(session=session, resource=body, spec=spec, now=ctx.clock.now(),
                                      owner=who.client)
            _audit(ctx, session, who, "create", row.id, row.version_id)
            return served_subscription(row)

    served = await run_in_threadpool(run)
    return fhir_response(served, 201, {"Location": f"{ctx.settings.base_url}/Subscription/{served['id']}"
                                                   f"/_history/{served['meta']['versionId']}"})


@router.get("/fhir/Subscription", dependencies=[Depends(require("Subscription", "s"))])
def search(ctx: ContextDep, who: RequesterDep) -> Response:
    """The caller's own subscriptions (every client's, for the admin scope)."""
    query = select(_S).order_by(_S.c.created_at, _S.c.id)
    if not _caller(who).admin:
        query = query.where(_S.c.owner_client == who.client)
    with ctx.db.session() as session:
        rows = session.execute(query).all()
    return fhir_response(searchset([served_subscription(r) for r in rows], base=ctx.settings.base_url,
                                   self_url=f"{ctx.settings.base_url}/Subscription", next_url=None,
                                   total=len(rows), now=ctx.clock.now()))


@router.get("/fhir/Subscription/{sid}", dependencies=[Depends(require("Subscription", "r"))])
def read(sid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    with ctx.db.session() as session:
        return fhir_response(served_subscription(_owned_row(session, sid, who)))


@router.put("/fhir/Subscription/{sid}", dependencies=[Depends(require("Subscription", "u"))])
async def replace(sid: str, request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    """Update; a client sets status ``requested`` (or ``active``) to re-activate after an error."""
    body, _ = await read_json(request, max_bytes=ctx.settings.max_body_bytes)
    if isinstance(body, dict) and body.get("id") not in (None, sid):
        raise RequestRejected([Issue("value", "the body's id must be the id in the URL", ("Subscription.id",))])
    spec = _spec(ctx, body)
    _may_carry_flags(who, spec.content)

    def run() -> dict[str, Any]:
        now = ctx.clock.now()
        with ctx.db.session(write=True) as session:
            row = _owned_row(session, sid, who)
            wanted = body.get("status")
            status = row.status
            if wanted == "off":
                status = "off"
            elif wanted in ("requested", "active") and row.status in ("error", "off", "requested"):
                status = "requested"
                queue_handshake(session=session, subscription_id=sid, now=now)
                # A client re-activating resumes delivery of what queued up meanwhile.
                session.execute(update(_E).where(_E.c.subscription_id == sid, _E.c.status == "failed")
                                .values(status="pending", attempts=0, next_attempt_at=now))
            stored = {k: v for k, v in body.items() if k not in ("id", "meta", "status", "error")}
            session.execute(update(_S).where(_S.c.id == sid).values(
                resource=orjson.dumps(stored), topic=spec.topic, status=status,
                error=None if status == "requested" else row.error, version_id=row.version_id + 1,
                last_updated=now))
            _audit(ctx, session, who, "update", sid, row.version_id + 1)
            return served_subscription(_row(session, sid))

    return fhir_response(await run_in_threadpool(run))


@router.delete("/fhir/Subscription/{sid}", dependencies=[Depends(require("Subscription", "d"))])
def delete(sid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    """Stops it (status ``off``); its events stay for the audit trail."""
    now = ctx.clock.now()
    with ctx.db.session(write=True) as session:
        row = _owned_row(session, sid, who)
        session.execute(update(_S).where(_S.c.id == sid).values(status="off", version_id=row.version_id + 1,
                                                                last_updated=now))
        _audit(ctx, session, who, "delete", sid, row.version_id + 1)
    return fhir_response(None, 204)


@router.get("/fhir/Subscription/{sid}/$status", dependencies=[Depends(require("Subscription", "r"))])
def status(sid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    with ctx.db.session() as session:
        state = subscription_state(_owned_row(session, sid, who), ctx.settings.base_url)
    return fhir_response(status_response([state], now=ctx.clock.now()))


@router.get("/fhir/Subscription/{sid}/$events", dependencies=[Depends(require("Subscription", "r"))])
def events(sid: str, request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    """Events by number, for a subscriber that saw a gap: eventsSinceNumber, eventsUntilNumber, content."""
    params = request.query_params
    since, until = _number(params.get("eventsSinceNumber")), _number(params.get("eventsUntilNumber"))
    content = params.get("content")
    if content is not None and content not in CONTENT_CODES:
        raise RequestRejected([Issue("value", f"content must be one of {', '.join(CONTENT_CODES)}")])
    with ctx.db.session() as session:
        row = _owned_row(session, sid, who)
        state = subscription_state(row, ctx.settings.base_url)
        shown = content or state.content
        _may_carry_flags(who, shown)
        out = []
        for e in events_between(session=session, subscription_id=sid, since=since, until=until)[:1000]:
            resource = flag_version(session=session, flag_id=e.focus_id, version=e.focus_version) \
                if shown == "full-resource" else None
            out.append(NotificationEvent(number=e.number, timestamp=e.created_at, focus=f"Flag/{e.focus_id}",
                                         interaction=e.interaction or "update", version_id=str(e.focus_version),
                                         last_updated=e.created_at, resource=resource))
    return fhir_response(events_response(state, out, now=ctx.clock.now(), content=content))


def _number(value: str | None) -> int | None:
    if value is None:
        return None
    if not value.isdigit() or len(value) > 18:  # beyond the database's 64-bit integers
        raise RequestRejected([Issue("value", f"event numbers are whole numbers below 10^18, not {value!r}")])
    return int(value)

