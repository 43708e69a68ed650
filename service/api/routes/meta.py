"""Unauthenticated: the CapabilityStatement and the health checks."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import Response
from sqlalchemy import text

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.fhir.capability import capability_statement

router = APIRouter()


@router.get("/fhir/metadata")
def metadata(ctx: ContextDep) -> Response:
    s = ctx.settings
    return fhir_response(capability_statement(base_url=s.base_url, now=ctx.clock.now(), lab_timezone=s.lab_timezone))


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
