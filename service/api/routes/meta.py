"""Unauthenticated: the CapabilityStatement, SMART discovery and the health checks."""

from __future__ import annotations

import orjson
from fastapi import APIRouter
from fastapi.responses import Response
from sqlalchemy import text

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.auth.smart import oauth_uris_extension, smart_configuration
from service.errors import NotFound
from service.fhir.capability import capability_statement

router = APIRouter()


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
def health() -> dict[str, str]:
    """The process is up."""
    return {"status": "ok"}


@router.get("/readyz")
def ready(ctx: ContextDep) -> dict[str, str]:
    """The database answers."""
    with ctx.db.session() as session:
        session.execute(text("SELECT 1"))
    return {"status": "ready"}
