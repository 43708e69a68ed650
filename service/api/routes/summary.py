"""``GET /fhir/Flag/$summary``: the informatics summary of a date range, for the analyst.

It must be registered before the generic ``/fhir/{rtype}/{rid}`` read, or ``$summary`` is read as a Flag id.
It needs Flag search and AuditEvent search: its figures are drawn from both. The answer holds counts and
times only — no patient keys, names or result values — and the access itself is audited. It answers a FHIR
Parameters resource: one parameter per figure, parts for the groups (OperationDefinition/Flag-summary).
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.api.paging import check_params
from service.api.requester import RequesterDep
from service.auth.deps import require
from service.db.audit import record_audit
from service.db.summary import load_facts
from service.errors import Issue, RequestRejected
from service.fhir.audit_render import AuditFacts
from service.fhir.parameters import as_parameters
from service.summary import parse_instant, summarise, summary_json

router = APIRouter()

_PARAMS = {"start", "end"}
MAX_SPAN = timedelta(days=366)  # bounds the rows one request loads


@router.get("/fhir/Flag/$summary",
            dependencies=[Depends(require("Flag", "s")), Depends(require("AuditEvent", "s"))])
async def flag_summary(request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    params = request.query_params
    check_params(params, _PARAMS)
    start, end = _range(params.get("start"), params.get("end"))
    now = ctx.clock.now()

    def run() -> dict[str, Any]:
        with ctx.db.session() as session:
            stored = load_facts(session=session, start=start, end=end, policy=ctx.policy)
            summary = summarise(stored, start=start, end=end)
        with ctx.db.session(write=True) as session:
            facts = AuditFacts(subtype="operation", operation="$summary", recorded=now, requester=who,
                               query=f"GET Flag/$summary?{request.url.query}",
                               details={"flags": str(summary.flags_raised)})
            record_audit(session=session, events=[(facts, None)], base_url=ctx.settings.base_url)
        return as_parameters(summary_json(summary), typed={"start": "valueInstant", "end": "valueInstant"})

    return fhir_response(await run_in_threadpool(run))


def _range(start: str | None, end: str | None) -> tuple[datetime, datetime]:
    if not start or not end:
        raise RequestRejected([Issue("required", "$summary needs start and end, e.g. "
                                     "start=2026-03-01&end=2026-03-03 (end excluded)")])
    return checked_range(start, end)


def checked_range(start: str, end: str) -> tuple[datetime, datetime]:
    """[start, end) of an informatics operation ($summary, $backtest): instants in order, at most MAX_SPAN."""
    try:
        low, high = parse_instant(start, "start"), parse_instant(end, "end")
    except ValueError as exc:
        raise RequestRejected([Issue("value", str(exc))]) from exc
    if high <= low:
        raise RequestRejected([Issue("value", "end must be after start (the range is [start, end))")])
    if high - low > MAX_SPAN:
        raise RequestRejected([Issue("too-costly", f"the range may span at most {MAX_SPAN.days} days")])
    return low, high
