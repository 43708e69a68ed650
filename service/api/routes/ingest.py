"""Writes: POST /fhir (Bundle), POST and conditional PUT of Observation and MedicationAdministration."""

from __future__ import annotations

import logging
from collections import Counter
from dataclasses import replace
from typing import Any

from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response, prefer_return, read_json
from service.api.requester import RequesterDep
from service.auth.deps import CallerDep, auth_outcome_response, entry_allowed, require, update_refusal
from service.auth.failures import forbidden
from service.auth.principal import Principal
from service.auth.scopes import needed_scope
from service.db.reads import read_version
from service.errors import Issue, RequestRejected
from service.fhir.render import operation_outcome, response_bundle
from service.ingest import EntryRequest, EntryResult
from service.ops.metrics import INGEST_RESULTS

router = APIRouter()
log = logging.getLogger("lytestream.auth")

_BUNDLE_TYPES = ("transaction", "batch")


@router.post("/fhir")
async def post_bundle(request: Request, ctx: ContextDep, who: RequesterDep, caller: CallerDep) -> Response:
    """A transaction (all or nothing) or batch (entry by entry) Bundle; scopes are checked per entry."""
    body, raw = await read_json(request, max_bytes=ctx.settings.max_body_bytes)
    entries, kind = _bundle_entries(body, ctx.settings.max_bundle_entries)
    for e in entries:
        if e.refused is not None:
            continue  # its envelope is unusable; nothing to authorise
        rtype = e.resource.get("resourceType") if isinstance(e.resource, dict) else None
        issue = entry_allowed(caller, str(rtype or (e.url or "").split("?")[0].split("/")[0]), e.method, url=e.url)
        if issue is not None:
            where = e.root.removesuffix(".resource")
            # A method we do not take is the method's fault, not the entry's: name that element.
            e.refused = (replace(issue, expression=(f"{where}.request.method",)) if issue.code == "not-supported"
                         else issue.at(where))
        elif rtype:
            refusal = update_refusal(caller, str(rtype))
            e.update_refused = refusal.at(e.root.removesuffix(".resource")) if refusal else None
    ingest = ctx.ingestor.transaction if kind == "transaction" else ctx.ingestor.batch
    try:
        results = await run_in_threadpool(ingest, entries, raw=raw, requester=who)
    except RequestRejected:
        _note_results(request, who.client, [], refused=len(entries))  # a transaction refused whole
        raise
    _note_results(request, who.client, results)
    want = prefer_return(request, "minimal")
    bundle = response_bundle(kind, results, representation=want == "representation", now=ctx.clock.now())
    return fhir_response(bundle)


def _bundle_entries(body: Any, max_entries: int) -> tuple[list[EntryRequest], str]:
    if not isinstance(body, dict) or body.get("resourceType") != "Bundle":
        rtype = body.get("resourceType") if isinstance(body, dict) else None
        raise RequestRejected([Issue("invalid", f"POST [base] takes a Bundle, not {rtype!r}", ("Bundle",))])
    kind = body.get("type")
    if kind not in _BUNDLE_TYPES:
        raise RequestRejected([Issue("not-supported", f"Bundle.type {kind!r} is not supported here; send a "
                                     "transaction or a batch", ("Bundle.type",))])
    raw_entries = body.get("entry") or []
    if not isinstance(raw_entries, list):
        raise RequestRejected([Issue("structure", "Bundle.entry must be a list", ("Bundle.entry",))])
    if len(raw_entries) > max_entries:
        raise RequestRejected([Issue("too-costly", f"Bundle has {len(raw_entries)} entries; the limit is "
                                     f"{max_entries}", ("Bundle.entry",), status=413)])
    # An entry whose envelope is unusable is refused in its own slot: in a batch the others still count.
    entries = [_entry(e, f"Bundle.entry[{i}]", kind) for i, e in enumerate(raw_entries)]
    return entries, kind


_REQUEST_STRINGS = ("method", "url", "ifNoneExist")
# Bundle.entry.request.method is bound (required) to http-verb: https://hl7.org/fhir/R4/valueset-http-verb.html
_HTTP_VERBS = ("GET", "HEAD", "POST", "PUT", "DELETE", "PATCH")


def _entry(e: Any, root: str, kind: str) -> EntryRequest:
    """One entry as a request; its envelope checked here, its resource by the ingestor."""
    if not isinstance(e, dict):
        return EntryRequest(root=f"{root}.resource", resource=None,
                            refused=Issue("structure", "a Bundle entry must be a JSON object", (root,)))
    request = e.get("request")
    full_url = e.get("fullUrl")
    refused: Issue | None = None
    if not isinstance(request, dict) or not request.get("method"):
        refused = Issue("required", f"entry.request with method and url is required in a {kind} (bdl-3)",
                        (f"{root}.request",))
    elif full_url is not None and not isinstance(full_url, str):
        refused = Issue("value", "fullUrl must be a JSON string (FHIR uri)", (f"{root}.fullUrl",))
    else:
        bad = next((k for k in _REQUEST_STRINGS if k in request and not isinstance(request[k], str)), None)
        if bad is not None:
            refused = Issue("value", f"request.{bad} must be a JSON string", (f"{root}.request.{bad}",))
        elif request["method"] not in _HTTP_VERBS:
            refused = Issue("code-invalid", f"request.method {request['method']!r} is not in the required value "
                            f"set http-verb ({', '.join(_HTTP_VERBS)}); codes are case-sensitive",
                            (f"{root}.request.method",))
    if refused is not None:
        return EntryRequest(root=f"{root}.resource", resource=e.get("resource"), refused=refused)
    assert isinstance(request, dict)
    return EntryRequest(root=f"{root}.resource", resource=e.get("resource"), method=request["method"],
                        url=request.get("url"), if_none_exist=request.get("ifNoneExist"), full_url=full_url)


async def _write(request: Request, ctx: ContextDep, who: RequesterDep, caller: Principal, rtype: str,
                 method: str) -> Response:
    body, raw = await read_json(request, max_bytes=ctx.settings.max_body_bytes)
    if not isinstance(body, dict) or body.get("resourceType") != rtype:
        got = body.get("resourceType") if isinstance(body, dict) else None
        raise RequestRejected([Issue("invalid", f"this endpoint takes a {rtype}, not {got!r}",
                                     (f"{rtype}.resourceType",))])
    url = rtype
    if method == "PUT":
        query = request.url.query
        if not query:
            raise RequestRejected([Issue("not-supported", f"lytestream assigns ids: use PUT {rtype}?identifier="
                                         "system|value")])
        url = f"{rtype}?{query}"
    entry = EntryRequest(root=rtype, resource=body, method=method, url=url,
                         if_none_exist=request.headers.get("if-none-exist"),
                         update_refused=update_refusal(caller, rtype))
    try:
        result: EntryResult = await run_in_threadpool(
            ctx.ingestor.single, entry, raw=raw, interaction="create" if method == "POST" else "update",
            requester=who)
    except RequestRejected as exc:
        if exc.status == 403 and all(i.code == "forbidden" for i in exc.issues if i.severity == "error"):
            # The ingestor refused (and audited) a create that would update: answer as any 403, with its challenge.
            log.warning("auth refused: status=403 error=insufficient_scope client=%s interaction=create-as-update "
                        "type=%s request=%s", who.client, rtype, who.request_id)
            return auth_outcome_response(forbidden(needed_scope(rtype, frozenset("cu"))),
                                         realm=ctx.settings.auth.realm)
        raise
    _note_results(request, who.client, [result])
    if (result.body is None and result.location and caller.allows(rtype, "r")
            and prefer_return(request, "representation") == "representation"):
        # Nothing new was written (a resend, a stale version, a matched If-None-Exist): answer with the version
        # held, to a caller who may read it. Anyone else gets the outcome: the held version is not theirs to see.
        rid, version = result.location.split("/")[1], result.version_id
        with ctx.db.session() as session:
            result.body = read_version(session=session, resource_type=rtype, rid=rid, version=version)
    return _single_response(request, result, ctx.settings.base_url)


def _outcome(result: EntryResult) -> str:
    """What became of one entry, in a word (a metric label and a log count)."""
    if result.status >= 400:
        return "refused"
    if result.location is None:
        return "suspect-code" if result.suspect_drop else "not-watched"
    if result.status == 201:
        return "created"
    return "updated" if result.body else "unchanged"


def _note_results(request: Request, client: str, results: list[EntryResult], refused: int = 0) -> None:
    """Count the entries by outcome: for the request's log line and the ingest metric."""
    counts = Counter(_outcome(r) for r in results)
    if refused:
        counts["refused"] += refused
    request.state.entries = len(results) + refused
    request.state.results = dict(sorted(counts.items()))
    for outcome, n in counts.items():
        INGEST_RESULTS.labels(outcome, client).inc(n)


def _single_response(request: Request, result: EntryResult, base_url: str) -> Response:
    headers: dict[str, str] = {}
    if result.location:
        headers["Location"] = f"{base_url}/{result.location}"
    if result.version_id is not None:
        headers["ETag"] = f'W/"{result.version_id}"'
    if result.last_modified is not None:
        headers["Last-Modified"] = result.last_modified.strftime("%a, %d %b %Y %H:%M:%S GMT")
    want = prefer_return(request, "representation")
    if want == "minimal" or (want == "representation" and not result.body and not result.issues):
        return fhir_response(None, result.status, headers)
    if want == "OperationOutcome" or not result.body:
        return fhir_response(operation_outcome(result.issues), result.status, headers)
    return fhir_response(result.body, result.status, headers)


@router.post("/fhir/Observation", dependencies=[Depends(require("Observation", "c"))])
async def create_observation(request: Request, ctx: ContextDep, who: RequesterDep, caller: CallerDep) -> Response:
    return await _write(request, ctx, who, caller, "Observation", "POST")


@router.put("/fhir/Observation", dependencies=[Depends(require("Observation", "cu"))])
async def update_observation(request: Request, ctx: ContextDep, who: RequesterDep, caller: CallerDep) -> Response:
    return await _write(request, ctx, who, caller, "Observation", "PUT")


@router.post("/fhir/MedicationAdministration",
             dependencies=[Depends(require("MedicationAdministration", "c"))])
async def create_administration(request: Request, ctx: ContextDep, who: RequesterDep,
                                caller: CallerDep) -> Response:
    return await _write(request, ctx, who, caller, "MedicationAdministration", "POST")


@router.put("/fhir/MedicationAdministration",
            dependencies=[Depends(require("MedicationAdministration", "cu"))])
async def update_administration(request: Request, ctx: ContextDep, who: RequesterDep,
                                caller: CallerDep) -> Response:
    return await _write(request, ctx, who, caller, "MedicationAdministration", "PUT")
