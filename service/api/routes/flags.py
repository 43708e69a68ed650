"""Flag search for the rapid-response team and the analyst; read/vread/_history live in read.py."""

from __future__ import annotations

import orjson
from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response
from starlette.datastructures import QueryParams

from service.acknowledging import acknowledge
from service.api.access_audit import audit_patient_access
from service.api.context import ContextDep
from service.api.fhir_io import fhir_response
from service.api.paging import Page, page_bundle, patient_alias, search_params, sort_param, strict_handling
from service.api.requester import RequesterDep
from service.auth.deps import require
from service.auth.scopes import needed_scope
from service.db.reads import FlagQuery, patient_key_for, read_references, search_flags
from service.domain.findings import Rule
from service.errors import Issue, RequestRejected
from service.fhir.audit_render import Requester
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
    """Record that the team has seen this Flag (stops its escalation) and show it on the Flag. Body:
    optional Parameters with a ``note`` (valueString) and ``who`` (valueString, or valueReference with a
    display): the person acknowledging, when not the token's client."""
    person, note = _ack_parameters(await request.body())
    outcome = await run_in_threadpool(acknowledge, ctx, flag_id=flag_id, who=who, person=person, note=note)
    parameters: list[dict[str, object]] = [
        {"name": "flag", "valueReference": {"reference": f"Flag/{flag_id}/_history/{outcome.version_id}"}},
        {"name": "acknowledged", "valueDateTime": fhir_instant(outcome.acknowledged_at)},
        {"name": "by", "valueString": outcome.by},
        {"name": "client", "valueString": outcome.client},
        {"name": "already", "valueBoolean": outcome.already},
        {"name": "message", "valueString": outcome.message},
    ]
    if outcome.note:
        parameters.insert(4, {"name": "note", "valueString": outcome.note})
    return fhir_response({"resourceType": "Parameters", "parameter": parameters})


def _ack_parameters(raw: bytes) -> tuple[str | None, str | None]:
    """(who, note) from the optional Parameters body; a wrongly typed one is refused with its path."""
    if not raw.strip():
        return None, None
    try:
        body = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise RequestRejected([Issue("structure", f"malformed JSON: {exc}")]) from exc
    if not isinstance(body, dict) or body.get("resourceType") != "Parameters":
        raise RequestRejected([Issue("invalid", "$acknowledge takes a Parameters resource", ("Parameters",))])
    parameters = body.get("parameter") or []
    if not isinstance(parameters, list):
        raise RequestRejected([Issue("structure", "Parameters.parameter must be a list", ("Parameters.parameter",))])
    found: dict[str, str] = {}
    for i, p in enumerate(parameters):
        at = f"Parameters.parameter[{i}]"
        if not isinstance(p, dict):
            raise RequestRejected([Issue("structure", "a parameter must be a JSON object", (at,))])
        name = p.get("name")
        if name not in ("note", "who"):
            continue
        if name in found:
            raise RequestRejected([Issue("structure", f"{name} may be given once", (at,))])
        if isinstance(p.get("valueString"), str):
            found[name] = p["valueString"]
        elif name == "who" and isinstance(p.get("valueReference"), dict):
            display = p["valueReference"].get("display")
            if not isinstance(display, str) or not display.strip():
                raise RequestRejected([Issue("required", "who as a valueReference needs a display: the name "
                                             "the team will read", (f"{at}.valueReference.display",))])
            found[name] = display
        else:
            kinds = "a valueString or a valueReference with a display" if name == "who" else "a valueString"
            raise RequestRejected([Issue("value", f"{name} must be {kinds}", (f"{at}.valueString",))])
    return found.get("who"), found.get("note")
