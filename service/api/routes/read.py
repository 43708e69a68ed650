"""Reads an integration engineer uses to see what arrived: read, vread, history, Observation search."""

from __future__ import annotations

import orjson
from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.access_audit import audit_patient_access
from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.api.paging import Page, page_bundle, patient_alias, search_params, sort_param
from service.api.requester import RequesterDep
from service.auth.deps import require
from service.auth.failures import forbidden
from service.auth.scopes import needed_scope
from service.db.reads import ObservationQuery, history, patient_key_for, read_version, search_observations
from service.domain.catalogue import LOINC_SYSTEM
from service.errors import Issue, NotFound, RequestRejected
from service.fhir.audit_render import Requester
from service.fhir.render import fhir_instant, status_line
from service.fhir.search import codes_in_system, date_bounds, intersect, tokens

router = APIRouter()

_READABLE = ("Observation", "MedicationAdministration", "Flag")
_OBS_PARAMS = {"patient", "patient:identifier", "subject", "code", "date", "identifier", "_id", "_lastUpdated",
               "status", "_sort"}
OBSERVATION_STATUS = "http://hl7.org/fhir/observation-status"
# FHIR R4 ValueSet observation-status (http://hl7.org/fhir/R4/valueset-observation-status.html).
OBSERVATION_STATUSES = ("registered", "preliminary", "final", "amended", "corrected", "cancelled",
                        "entered-in-error", "unknown")


@router.get("/fhir/{rtype}/{rid}")
def read(rtype: str, rid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    return _vread(rtype, rid, None, ctx, who)


@router.get("/fhir/{rtype}/{rid}/_history/{vid}")
def vread(rtype: str, rid: str, vid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    if not vid.isdigit() or len(vid) > 18:  # no version above the database's 64-bit integers is held
        raise NotFound(f"{rtype}/{rid} has no version {vid!r}")
    return _vread(rtype, rid, int(vid), ctx, who)


def _vread(rtype: str, rid: str, vid: int | None, ctx: ContextDep, who: Requester) -> Response:
    _readable(rtype)
    _allowed(rtype, "r", ctx, who)
    with ctx.db.session() as session:
        body = read_version(session=session, resource_type=rtype, rid=rid, version=vid)
    if body is None:
        raise NotFound(f"{rtype}/{rid}" + (f"/_history/{vid}" if vid else "") + " is not held here")
    audit_patient_access(ctx, who, [body], subtype="vread" if vid else "read")
    meta = orjson.loads(body)["meta"]
    return fhir_response(body, headers={"ETag": f'W/"{meta["versionId"]}"'})


@router.get("/fhir/{rtype}/{rid}/_history")
def instance_history(rtype: str, rid: str, ctx: ContextDep, who: RequesterDep) -> Response:
    _readable(rtype)
    _allowed(rtype, "r", ctx, who)
    with ctx.db.session() as session:
        versions = history(session=session, resource_type=rtype, rid=rid)
    if not versions:
        raise NotFound(f"{rtype}/{rid} is not held here")
    audit_patient_access(ctx, who, [versions[0][2]], subtype="history-instance")
    base = ctx.settings.base_url
    entries = [
        {
            "fullUrl": f"{base}/{rtype}/{rid}",
            "resource": orjson.loads(body),
            "request": {"method": "POST" if vid == 1 else "PUT", "url": rtype if vid == 1 else f"{rtype}/{rid}"},
            "response": {"status": status_line(201 if vid == 1 else 200), "etag": f'W/"{vid}"',
                         "lastModified": fhir_instant(when)},
        }
        for vid, when, body in versions
    ]
    return fhir_response({"resourceType": "Bundle", "type": "history", "total": len(entries), "entry": entries})


@router.get("/fhir/Observation", dependencies=[Depends(require("Observation", "s"))])
async def search(request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    params, ignored = search_params(request.query_params, request.headers, _OBS_PARAMS)
    page = Page(params, ctx.settings)
    sort = sort_param(params, "-date")
    low, high = date_bounds(params.getlist("date"))
    updated_low, updated_high = date_bounds(params.getlist("_lastUpdated"), "_lastUpdated")
    # search.html#token: only LOINC codes are held, so a code of another system matches nothing.
    codes = intersect(codes_in_system(params.getlist("code"), LOINC_SYSTEM, "code"))
    statuses = intersect(codes_in_system(params.getlist("status"), OBSERVATION_STATUS, "status",
                                         OBSERVATION_STATUSES))
    ids = intersect([{t.code for t in tokens(v)} for v in params.getlist("_id")])
    identifiers = [[(t.system, t.code) for t in tokens(v)] for v in params.getlist("identifier")]
    alias = patient_alias(params)

    def run() -> tuple[list[bytes], int]:
        with ctx.db.session() as session:
            key = patient_key_for(session=session, alias=alias) if alias else None
            if alias and key is None:
                return [], 0
            q = ObservationQuery(patient_key=key, codes=_listed(codes), ids=_listed(ids),
                                 identifiers=identifiers, statuses=_listed(statuses), date_from=low, date_to=high,
                                 updated_from=updated_low, updated_to=updated_high, sort=sort, count=page.count,
                                 offset=page.offset)
            return search_observations(session=session, q=q)

    rows, total = await run_in_threadpool(run)
    await run_in_threadpool(audit_patient_access, ctx, who, rows, subtype="search-type",
                            query=f"GET Observation?{request.url.query}")
    return fhir_response(page_bundle(rtype="Observation", params=params, page=page, rows=rows, total=total,
                                     settings=ctx.settings, now=ctx.clock.now(), outcome=ignored))


def _listed(codes: set[str] | None) -> list[str] | None:
    return None if codes is None else sorted(codes)


def _allowed(rtype: str, interaction: str, ctx: ContextDep, who: Requester) -> None:
    """Scope check for the generic read routes, whose resource type is a path parameter."""
    principal = who.principal
    if principal is not None and not principal.allows(rtype, interaction):
        raise forbidden(needed_scope(rtype, frozenset(interaction)))


def _readable(rtype: str) -> None:
    if rtype not in _READABLE:
        raise RequestRejected([Issue("not-supported", f"{rtype} is not served here", status=404)])
