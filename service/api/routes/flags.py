"""Flag search for the rapid-response team and the analyst; read/vread/_history live in read.py."""

from __future__ import annotations

import orjson
from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response
from starlette.datastructures import QueryParams

from service.api.access_audit import audit_patient_access
from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.api.paging import Page, page_bundle, patient_alias, search_params, sort_param, strict_handling
from service.api.requester import RequesterDep
from service.auth.deps import require
from service.auth.scopes import needed_scope
from service.db.acks import acknowledge
from service.db.audit import record_audit
from service.db.flags import subjects
from service.db.reads import FlagQuery, patient_key_for, read_references, search_flags
from service.domain.findings import Rule
from service.errors import Issue, NotFound, RequestRejected
from service.fhir.audit_render import AuditFacts, Requester
from service.fhir.flag_render import FLAG_DETAIL_URL, RULE_SYSTEM
from service.fhir.render import fhir_instant
from service.fhir.search import acknowledged_param, codes_in_system, date_bounds, intersect, minutes_param, tokens

router = APIRouter()

_PARAMS = {"patient", "patient:identifier", "subject", "date", "_lastUpdated", "status", "code", "priority",
           "detail", "_sort", "_include", "encounter", "acknowledged", "acknowledged-after"}
FLAG_STATUS = "http://hl7.org/fhir/flag-status"
FLAG_STATUSES = ("active", "inactive", "entered-in-error")  # FHIR R4 ValueSet flag-status
FLAG_PRIORITY = "http://hl7.org/fhir/flag-priority-code"
FLAG_PRIORITIES = ("PN", "PL", "PM", "PH")  # FHIR R4 ValueSet flag-priority (PN, no alarm, is never raised here)
_PRIORITY_CODES = {"PH": "high", "PM": "medium", "PL": "low"}
INCLUDE_EVIDENCE = "Flag:detail"  # our name for "the result versions each Flag rests on"


@router.get("/fhir/Flag", dependencies=[Depends(require("Flag", "s"))])
async def search(request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    params, ignored = search_params(request.query_params, request.headers, _PARAMS)
    page = Page(params, ctx.settings)
    sort = sort_param(params, "-_lastUpdated")
    includes = [i for i in params.getlist("_include") if i == INCLUDE_EVIDENCE]
    other = sorted(set(params.getlist("_include")) - {INCLUDE_EVIDENCE})
    if other:
        # An include we cannot do is an unsupported parameter value: lenient unless asked to be strict.
        issue = Issue("not-supported", f"_include={', '.join(other)} is not supported and was ignored; "
                      f"_include supports {INCLUDE_EVIDENCE} only", severity="warning")
        if strict_handling(request.headers):
            raise RequestRejected([Issue(issue.code, issue.message)])
        ignored.append(issue)
        params = QueryParams([(k, v) for k, v in params.multi_items() if not (k == "_include" and v in other)])
    low, high = date_bounds(params.getlist("date"))
    updated_low, updated_high = date_bounds(params.getlist("_lastUpdated"), "_lastUpdated")
    statuses = intersect(codes_in_system(params.getlist("status"), FLAG_STATUS, "status", FLAG_STATUSES))
    rules = intersect(codes_in_system(params.getlist("code"), RULE_SYSTEM, "code", [r.value for r in Rule]))
    priority_codes = intersect(codes_in_system(params.getlist("priority"), FLAG_PRIORITY, "priority",
                                               FLAG_PRIORITIES))
    priorities = None if priority_codes is None else [_PRIORITY_CODES[p] for p in priority_codes
                                                      if p in _PRIORITY_CODES]
    details = intersect([{t.code for t in tokens(v)} for v in params.getlist("detail")])
    alias = patient_alias(params)
    encounters = intersect([{t.code for t in tokens(v)} for v in params.getlist("encounter")])
    q = FlagQuery(details=_listed(details), statuses=_listed(statuses), rules=_listed(rules), priorities=priorities,
                  date_from=low, date_to=high, updated_from=updated_low, updated_to=updated_high, sort=sort, count=page.count, offset=page.offset,
                  acknowledged=acknowledged_param(params.getlist("acknowledged")),
                  ack_delay=minutes_param(params.getlist("acknowledged-after"), "acknowledged-after"),
                  encounters=_listed(encounters))

    def run() -> tuple[list[bytes], int, list[bytes], list[Issue]]:
        with ctx.db.session() as session:
            key = patient_key_for(session=session, alias=alias) if alias else None
            rows, total = ([], 0) if alias and key is None else search_flags(
                session=session, q=FlagQuery(**{**q.__dict__, "patient_key": key}))
            included: list[bytes] = []
            withheld: list[Issue] = []
            if includes:
                refs = [e["valueReference"]["reference"] for r in rows for e in orjson.loads(r)["extension"]
                        if e["url"] == FLAG_DETAIL_URL]
                readable, withheld = _readable_evidence(refs, who)
                included = read_references(session=session, references=readable)
        audit_patient_access(ctx, who, rows, subtype="search-type", query=f"GET Flag?{request.url.query}")
        return rows, total, included, withheld

    rows, total, included, withheld = await run_in_threadpool(run)
    return fhir_response(page_bundle(rtype="Flag", params=params, page=page, rows=rows, total=total,
                                     settings=ctx.settings, now=ctx.clock.now(), included=included,
                                     outcome=[*ignored, *withheld]))


def _listed(codes: set[str] | None) -> list[str] | None:
    return None if codes is None else sorted(codes)


def _readable_evidence(refs: list[str], who: Requester) -> tuple[list[str], list[Issue]]:
    """The evidence references the caller may read, and one warning per resource type left out.

    An included resource is read as surely as ``GET [type]/[id]``, so it needs the same scope; a Flag scope
    alone must not hand out the results behind it. The warning names what was left out and the scope that
    would include it, so an empty include is never mistaken for "no evidence".
    """
    principal = who.principal
    readable: list[str] = []
    left_out: dict[str, set[str]] = {}
    for ref in dict.fromkeys(refs):
        rtype = ref.split("/", 1)[0]
        if principal is not None and principal.allows(rtype, "r"):
            readable.append(ref)
        else:
            left_out.setdefault(rtype, set()).add(ref)
    issues = [Issue("suppressed", f"{len(found)} {rtype} resource(s) named by Flag:detail were left out: the "
                    f"token's scopes do not cover reading them; it needs {needed_scope(rtype, 'r')}",
                    severity="warning")
              for rtype, found in sorted(left_out.items())]
    return readable, issues


@router.post("/fhir/Flag/{flag_id}/$acknowledge", dependencies=[Depends(require("Flag", "u"))])
async def acknowledge_flag(flag_id: str, request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    """Record that the team has seen this Flag (stops its escalation). Body: optional Parameters with a
    ``note`` (valueString)."""
    note = await _ack_note(request)
    now = ctx.clock.now()

    def run() -> dict[str, object]:
        with ctx.db.session(write=True) as session:
            flag = acknowledge(session=session, flag_id=flag_id, client=who.client, note=note, now=now)
            if flag is None:
                raise NotFound(f"Flag/{flag_id} is not held here")
            if flag.status != "active":
                raise RequestRejected([Issue("business-rule", f"Flag/{flag_id} is {flag.status}; only an active "
                                             "Flag can be acknowledged", status=409)])
            subject = subjects(session=session, patient_keys=[flag.patient_key]).get(flag.patient_key, {})
            facts = AuditFacts(subtype="operation", operation="$acknowledge", recorded=now, requester=who,
                               patient=subject, what=[f"Flag/{flag_id}/_history/{flag.version_id}"])
            record_audit(session=session, events=[(facts, flag.patient_key)], base_url=ctx.settings.base_url)
            return {"resourceType": "Parameters", "parameter": [
                {"name": "flag", "valueReference": {"reference": f"Flag/{flag_id}/_history/{flag.version_id}"}},
                {"name": "acknowledged", "valueDateTime": fhir_instant(now)},
                {"name": "by", "valueString": who.client},
            ]}

    return fhir_response(await run_in_threadpool(run))


async def _ack_note(request: Request) -> str | None:
    raw = await request.body()
    if not raw.strip():
        return None
    try:
        body = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise RequestRejected([Issue("structure", f"malformed JSON: {exc}")]) from exc
    if not isinstance(body, dict) or body.get("resourceType") != "Parameters":
        raise RequestRejected([Issue("invalid", "$acknowledge takes a Parameters resource", ("Parameters",))])
    parameters = body.get("parameter") or []
    if not isinstance(parameters, list):
        raise RequestRejected([Issue("structure", "Parameters.parameter must be a list", ("Parameters.parameter",))])
    for i, p in enumerate(parameters):
        if not isinstance(p, dict):
            raise RequestRejected([Issue("structure", "a parameter must be a JSON object",
                                         (f"Parameters.parameter[{i}]",))])
        if p.get("name") == "note":
            if not isinstance(p.get("valueString"), str):
                raise RequestRejected([Issue("value", "note must be a valueString",
                                             (f"Parameters.parameter[{i}].valueString",))])
            return str(p["valueString"])[:2000]
    return None
