"""AuditEvent search for the informatics analyst and the security officer. Append-only: no writes."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.api.paging import Page, check_params, page_bundle, patient_alias, split_tokens
from service.auth.deps import require
from service.db.audit import AuditQuery, search_audit
from service.db.reads import patient_key_for
from service.fhir.search import date_bounds

router = APIRouter()

_PARAMS = {"date", "agent", "patient", "patient:identifier", "subtype", "outcome", "_count", "_offset"}


@router.get("/fhir/AuditEvent", dependencies=[Depends(require("AuditEvent", "s"))])
async def search(request: Request, ctx: ContextDep) -> Response:
    params = request.query_params
    check_params(params, _PARAMS)
    page = Page(params, ctx.settings)
    low, high = date_bounds(params.getlist("date"))
    alias = patient_alias(params)
    q = AuditQuery(date_from=low, date_to=high, clients=split_tokens(params, "agent"),
                   subtypes=split_tokens(params, "subtype"), outcomes=split_tokens(params, "outcome"),
                   count=page.count, offset=page.offset)

    def run() -> tuple[list[bytes], int]:
        with ctx.db.session() as session:
            key = patient_key_for(session=session, alias=alias) if alias else None
            if alias and key is None:
                return [], 0
            return search_audit(session=session, q=AuditQuery(**{**q.__dict__, "patient_key": key}))

    rows, total = await run_in_threadpool(run)
    return fhir_response(page_bundle(rtype="AuditEvent", params=params, page=page, rows=rows, total=total,
                                     settings=ctx.settings, now=ctx.clock.now()))
