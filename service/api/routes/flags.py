"""Flag search for the rapid-response team and the analyst; read/vread/_history live in read.py."""

from __future__ import annotations

import orjson
from fastapi import APIRouter, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.api.paging import Page, check_params, page_bundle, patient_alias, split_tokens
from service.db.reads import FlagQuery, patient_key_for, read_references, search_flags
from service.errors import Issue, RequestRejected
from service.fhir.flag_render import FLAG_DETAIL_URL
from service.fhir.search import date_bounds

router = APIRouter()

_PARAMS = {"patient", "patient:identifier", "subject", "date", "_lastUpdated", "status", "code", "priority",
           "_count", "_offset", "_sort", "_include"}
_PRIORITY_CODES = {"PH": "high", "PM": "medium", "PL": "low"}
INCLUDE_EVIDENCE = "Flag:detail"  # our name for "the result versions each Flag rests on"


@router.get("/fhir/Flag")
async def search(request: Request, ctx: ContextDep) -> Response:
    params = request.query_params
    check_params(params, _PARAMS)
    page = Page(params, ctx.settings)
    sort = params.get("_sort", "-_lastUpdated")
    if sort.lstrip("-") not in ("date", "_lastUpdated"):
        raise RequestRejected([Issue("not-supported", "_sort supports date, -date, _lastUpdated, -_lastUpdated")])
    includes = params.getlist("_include")
    if any(i != INCLUDE_EVIDENCE for i in includes):
        raise RequestRejected([Issue("not-supported", f"_include supports {INCLUDE_EVIDENCE} only")])
    low, high = date_bounds(params.getlist("date"))
    updated_low, updated_high = date_bounds(params.getlist("_lastUpdated"), "_lastUpdated")
    priorities = [_PRIORITY_CODES.get(p, p) for p in split_tokens(params, "priority")]
    alias = patient_alias(params)
    q = FlagQuery(statuses=split_tokens(params, "status"), rules=split_tokens(params, "code"),
                  priorities=priorities, date_from=low, date_to=high, updated_from=updated_low,
                  updated_to=updated_high, sort=sort, count=page.count, offset=page.offset)

    def run() -> tuple[list[bytes], int, list[bytes]]:
        with ctx.db.session() as session:
            key = patient_key_for(session=session, alias=alias) if alias else None
            if alias and key is None:
                return [], 0, []
            rows, total = search_flags(session=session, q=FlagQuery(**{**q.__dict__, "patient_key": key}))
            included: list[bytes] = []
            if includes:
                refs = [e["valueReference"]["reference"] for r in rows for e in orjson.loads(r)["extension"]
                        if e["url"] == FLAG_DETAIL_URL]
                included = read_references(session=session, references=refs)
            return rows, total, included

    rows, total, included = await run_in_threadpool(run)
    return fhir_response(page_bundle(rtype="Flag", params=params, page=page, rows=rows, total=total,
                                     settings=ctx.settings, now=ctx.clock.now(), included=included))
