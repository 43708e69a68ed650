"""Unauthenticated: the CapabilityStatement, SMART discovery, the health checks (and metrics, by setting)."""

from __future__ import annotations

import logging

import orjson
from fastapi import APIRouter, Request
from fastapi.responses import Response
from prometheus_client import CONTENT_TYPE_LATEST
from sqlalchemy import text
from sqlalchemy.exc import DBAPIError

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.auth.smart import oauth_uris_extension, smart_configuration
from service.db.migrate import head_revisions, pending_revision
from service.errors import NotFound
from service.fhir.capability import capability_statement
from service.logsafe import describe
from service.ops.metrics import exposition

router = APIRouter()
log = logging.getLogger("lytestream.health")


@router.get("/fhir/metadata")
def metadata(ctx: ContextDep) -> Response:
    s = ctx.settings
    return fhir_response(capability_statement(base_url=s.base_url, now=ctx.clock.now(), lab_timezone=s.lab_timezone,
                                              oauth_uris=oauth_uris_extension(s.auth)))


@router.get("/.well-known/smart-configuration")
@router.get("/fhir/.well-known/smart-configuration")
def smart_discovery(ctx: ContextDep) -> Response:
    """SMART App Launch 2.x discovery, at [base]/.well-known/ as the spec places it and at the host root."""
    config = smart_configuration(ctx.settings.auth)
    if config is None:
        raise NotFound("this server accepts only tokens it minted itself (lytestream token create): there is no "
                       "OAuth token endpoint to discover")
    return Response(content=orjson.dumps(config), media_type="application/json")


@router.get("/healthz")
def health(ctx: ContextDep) -> Response:
    """The process is up and its time-driven jobs (the dispatcher is deliver-outbox) keep running: each
    job's last run and age; 503 when one has missed several of its intervals."""
    healthy, jobs = ctx.heartbeats.report(ctx.clock.now())
    body = {"status": "ok" if healthy else "stale", "scheduler": "on" if ctx.settings.scheduler else "off",
            "jobs": jobs}
    return Response(orjson.dumps(body), status_code=200 if healthy else 503, media_type="application/json")


@router.get("/readyz")
def ready(ctx: ContextDep) -> Response:
    """Ready for traffic: the database answers and its schema is this code's newest migration."""
    try:
        with ctx.db.session() as session:
            session.execute(text("SELECT 1"))
        pending = pending_revision(ctx.db)
    except DBAPIError as exc:
        log.warning("readiness: database unreachable", extra={"error": describe(exc)})
        return _not_ready(f"database unreachable ({type(exc.orig).__name__ if exc.orig else describe(exc)})")
    if pending is not None:
        return _not_ready(f"database schema at {pending}, not at this version's "
                          f"{', '.join(sorted(head_revisions()))}: run `lytestream db upgrade`")
    return Response(orjson.dumps({"status": "ready"}), media_type="application/json")


def _not_ready(reason: str) -> Response:
    return Response(orjson.dumps({"status": "not ready", "reason": reason}), status_code=503,
                    media_type="application/json", headers={"Retry-After": "5"})


@router.get("/metrics", include_in_schema=False)
def metrics(request: Request, ctx: ContextDep) -> Response:
    """Prometheus text, when the ``metrics`` setting allows it: ``open`` for a scraper on a trusted network,
    ``token`` for any valid bearer token of this service; ``off`` (the default) answers 404."""
    mode = ctx.settings.metrics
    if mode == "off":
        raise NotFound("metrics are off on this server (setting LYTESTREAM_METRICS)")
    if mode == "token":
        request.app.state.authenticator.authenticate(request.headers.get("authorization"))
    body = exposition(ctx.db, ctx.clock, ctx.settings.metrics_multiprocess_dir)
    return Response(body, media_type=CONTENT_TYPE_LATEST)
