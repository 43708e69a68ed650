"""Subscriptions (R5 Backport on R4): create, read, search, update, delete, $status and $events.

A subscription belongs to the client that created it: another client may not see, change, stop, or fetch
the events of it unless its token holds ``lytestream/admin``. A full-resource payload carries Flags, so
creating one, switching to one, or fetching events as full resources also needs ``system/Flag.r``; an id-only
subscriber needs that scope when it reads the Flags named (``GET Flag/{id}`` checks it).
"""

from __future__ import annotations

import logging
from typing import Any

import orjson
from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response
from sqlalchemy import select, update
from sqlmodel import Session

from service.api.access_audit import audit_patient_access
from service.api.context import AppContext, ContextDep
from service.api.fhir_io import fhir_response, read_json
from service.api.requester import RequesterDep
from service.auth.deps import require
from service.auth.failures import forbidden, not_owner
from service.auth.principal import Principal
from service.auth.scopes import ADMIN_SCOPE, needed_scope
from service.db.audit import record_audit
from service.db.subscriptions import (
    DELETED,
    WITHHELD,
    create_subscription,
    delivery_trouble,
    events_between,
    flag_version,
    keep_withheld_headers,
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
log = logging.getLogger("lytestream.subscriptions")
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
    """The subscription's row, deleted or not; 404 when never held."""
    row = session.execute(select(_S).where(_S.c.id == sid)).first()
    if row is None:
        raise NotFound(f"Subscription/{sid} is not held here")
    return row


def _gone(sid: str) -> RequestRejected:
    # http.html#read: a deleted resource reads as 410 Gone.
    return RequestRejected([Issue("deleted", f"Subscription/{sid} was deleted", status=410)])


def _caller(who: Requester) -> Principal:
    principal = who.principal
    if not isinstance(principal, Principal):
        # Fail closed: every route here is authenticated, so this is wiring gone wrong, not a caller to trust.
        raise RuntimeError("subscription route reached without an authenticated caller")
    return principal


def _owned_row(session: Session, sid: str, who: Requester, *, deleted_too: bool = False) -> Any:
    """The subscription, if the caller made it or holds the admin scope; 403 otherwise (404 if not held, 410 if
    deleted unless ``deleted_too``)."""
    row = _row(session, sid)
    if not _caller(who).admin and (row.owner_client is None or row.owner_client != who.client):
        raise not_owner(f"Subscription/{sid}", ADMIN_SCOPE)
    if row.status == DELETED and not deleted_too:
        raise _gone(sid)
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
    query = select(_S).where(_S.c.status != DELETED).order_by(_S.c.created_at, _S.c.id)
    if not _caller(who).admin:
        query = query.where(_S.c.owner_client == who.client)
    with ctx.db.session() as session:
        rows = session.execute(query).all()
    return fhir_response(searchset([served_subscription(r) for r in rows], base=ctx.settings.base_url,
                                   links={"self": f"{ctx.settings.base_url}/Subscription"},
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
            missing = keep_withheld_headers(body, orjson.loads(row.resource))
            if missing:
                raise RequestRejected([Issue("value", f"header {name} carries the masked value {WITHHELD!r} but "
                                             "no header of that name is held to keep; send its value",
                                             (f"Subscription.channel.header[{i}]",), status=422)
                                       for i, name in missing])
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
            if status != row.status:
                log.info("subscription state", extra={"subscription": sid, "from": row.status, "to": status,
                                                      "by": who.client})
            return served_subscription(_row(session, sid))

    return fhir_response(await run_in_threadpool(run))


@router.delete("/fhir/Subscription/{sid}", dependencies=[Depends(require("Subscription", "d"))])
def delete(sid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    """Deletes it (http.html#delete): nothing more is sent, reads answer 410 Gone, search leaves it out; its
    events stay for the audit trail. Deleting one never held, or already deleted, succeeds too."""
    now = ctx.clock.now()
    with ctx.db.session(write=True) as session:
        try:
            row = _owned_row(session, sid, who, deleted_too=True)
        except NotFound:
            return fhir_response(None, 204)
        if row.status != DELETED:
            session.execute(update(_S).where(_S.c.id == sid).values(
                status=DELETED, version_id=row.version_id + 1, last_updated=now, lease_owner=None,
                lease_until=None))
            _audit(ctx, session, who, "delete", sid, row.version_id + 1)
    return fhir_response(None, 204)


@router.get("/fhir/Subscription/{sid}/$status", dependencies=[Depends(require("Subscription", "r"))])
def status(sid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    with ctx.db.session() as session:
        row = _owned_row(session, sid, who)
        state = subscription_state(row, ctx.settings.base_url,
                                   trouble=delivery_trouble(session=session, subscription_id=sid))
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
    if shown == "full-resource":
        audit_patient_access(ctx, who, [orjson.dumps(e.resource) for e in out if e.resource is not None],
                             subtype="operation", operation="$events",
                             query=f"GET Subscription/{sid}/$events?{request.url.query}")
    return fhir_response(events_response(state, out, now=ctx.clock.now(), content=content))


def _number(value: str | None) -> int | None:
    if value is None:
        return None
    if not value.isdigit() or len(value) > 18:  # beyond the database's 64-bit integers
        raise RequestRejected([Issue("value", f"event numbers are whole numbers below 10^18, not {value!r}")])
    return int(value)

