"""``POST /fhir/$backtest``: the policy backtest as an asynchronous operation (FHIR async pattern).

The request is a Parameters resource: ``start`` and ``end`` (the range [start, end), as ``$summary``),
``policy`` (the candidate policy's TOML text) and optionally ``baseline`` (TOML text; default the policy in
force). It answers 202 with ``Content-Location`` naming a status URL; polling that answers 202 while the job
runs and 200 with a Parameters resource when it is done (counts and times only, like ``$summary``: the
Flags gained and lost with their patients are the CLI's CSV). ``DELETE`` on the status URL forgets the job.
It needs what ``$summary`` needs (Flag and AuditEvent search) and is audited like it.
"""

from __future__ import annotations

import tempfile
from collections import Counter
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service.api.context import ContextDep
from service.api.fhir_io import fhir_response, read_json
from service.api.requester import RequesterDep
from service.api.routes.summary import checked_range
from service.auth.deps import require
from service.backtest.compare import Comparison
from service.backtest.jobs import JobBoard
from service.backtest.output import ASSUMPTIONS
from service.backtest.run import Backtest, run_backtest
from service.db.audit import record_audit
from service.errors import Issue, NotFound, RequestRejected
from service.fhir.audit_render import AuditFacts
from service.fhir.parameters import as_parameters
from service.fhir.render import CAUTION, fhir_instant
from service.policy import Policy, PolicyError, load_policy, policy_hash
from service.vocabulary import priority_code

router = APIRouter()

_SCOPE = [Depends(require("Flag", "s")), Depends(require("AuditEvent", "s"))]
_MAX_POLICY_CHARS = 200_000


def _board(request: Request) -> JobBoard:
    board = getattr(request.app.state, "backtests", None)
    if board is None:
        board = request.app.state.backtests = JobBoard()
    return board


@router.post("/fhir/$backtest", dependencies=_SCOPE)
async def start_backtest(request: Request, ctx: ContextDep, who: RequesterDep) -> Response:
    body, _ = await read_json(request, max_bytes=ctx.settings.max_body_bytes)
    start, end, candidate, baseline = _read(body, ctx.policy)
    now = ctx.clock.now()
    job = Backtest(database_url=ctx.settings.resolved_database_url, baseline=baseline, candidate=candidate,
                   start=start, end=end, lookback=timedelta(hours=ctx.settings.lookback_hours))

    def audit() -> None:
        with ctx.db.session(write=True) as session:
            facts = AuditFacts(subtype="operation", operation="$backtest", recorded=now, requester=who,
                               query="POST $backtest",
                               details={"start": fhir_instant(start), "end": fhir_instant(end),
                                        "candidate": policy_hash(candidate)})
            record_audit(session=session, events=[(facts, None)], base_url=ctx.settings.base_url)

    await run_in_threadpool(audit)
    queued = _board(request).submit(who.client, now, lambda: _answer(run_backtest(job)))
    if queued is None:
        raise RequestRejected([Issue("too-costly", "too many backtests are running; try again later",
                                     status=429)])
    status_url = f"{ctx.settings.base_url}/$backtest-status/{queued.id}"
    outcome = {"resourceType": "OperationOutcome", "issue": [{"severity": "information", "code": "informational",
                                                               "diagnostics": f"backtest accepted; poll {status_url}"}]}
    return fhir_response(outcome, 202, headers={"Content-Location": status_url})


@router.get("/fhir/$backtest-status/{job_id}", dependencies=_SCOPE)
async def backtest_status(job_id: str, request: Request, who: RequesterDep) -> Response:
    job = _board(request).get(job_id)
    if job is None or job.owner != who.client:  # another client's job is not named to it
        raise NotFound(f"no backtest {job_id} (jobs are kept for a day, in the process that accepted them)")
    if job.status == "in-progress":
        return Response(status_code=202, headers={"X-Progress": "in progress", "Retry-After": "5"})
    if job.status == "failed":
        outcome = {"resourceType": "OperationOutcome",
                   "issue": [{"severity": "error", "code": "exception", "diagnostics": job.error}]}
        return fhir_response(outcome, 500)
    return fhir_response(job.result)


@router.delete("/fhir/$backtest-status/{job_id}", dependencies=_SCOPE)
async def cancel_backtest(job_id: str, request: Request, who: RequesterDep) -> Response:
    board = _board(request)
    job = board.get(job_id)
    if job is None or job.owner != who.client or not board.cancel(job_id):
        raise NotFound(f"no backtest {job_id}")
    return Response(status_code=202)


def _read(body: Any, current: Policy) -> tuple[datetime, datetime, Policy, Policy]:
    if not isinstance(body, dict) or body.get("resourceType") != "Parameters":
        raise RequestRejected([Issue("invalid", "$backtest takes a Parameters resource", ("Parameters",))])
    values: dict[str, tuple[int, str]] = {}
    for i, p in enumerate(body.get("parameter") or []):
        if not isinstance(p, dict) or not isinstance(p.get("name"), str):
            raise RequestRejected([Issue("structure", "a parameter must be an object with a name",
                                         (f"Parameters.parameter[{i}]",))])
        value = next((v for k, v in p.items() if k.startswith("value")), None)
        if not isinstance(value, str):
            raise RequestRejected([Issue("value", f"{p['name']} must be a string value (valueString, "
                                         "valueDate or valueInstant)", (f"Parameters.parameter[{i}]",))])
        values[p["name"]] = (i, value)
    unknown = sorted(set(values) - {"start", "end", "policy", "baseline"})
    if unknown:
        raise RequestRejected([Issue("not-supported", f"unknown parameter(s) {', '.join(unknown)}; $backtest "
                                     "takes start, end, policy and baseline")])
    for name in ("start", "end", "policy"):
        if name not in values:
            raise RequestRejected([Issue("required", f"$backtest needs {name}", ("Parameters.parameter",))])
    start, end = checked_range(values["start"][1], values["end"][1])
    candidate = _policy(*values["policy"], "policy")
    baseline = _policy(*values["baseline"], "baseline") if "baseline" in values else current
    return start, end, candidate, baseline


def _policy(index: int, text: str, name: str) -> Policy:
    where = (f"Parameters.parameter[{index}]",)
    if len(text) > _MAX_POLICY_CHARS:
        raise RequestRejected([Issue("too-costly", f"{name} is longer than {_MAX_POLICY_CHARS} characters", where)])
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"{name}.toml"
        path.write_text(text, "utf-8")
        try:
            return load_policy(path)
        except PolicyError as exc:
            message = str(exc).replace(str(path), name)
            raise RequestRejected([Issue("value", f"{name} refused: {message}", where)]) from exc


def _answer(c: Comparison) -> dict[str, Any]:
    """The comparison as Parameters: figures only, no patient keys or sentences."""
    def side(p: Any) -> dict[str, Any]:
        t = p.total
        by_rule = Counter[str]()
        by_priority = Counter[str]()
        for r in p.rows:
            by_rule[r.rule] += r.flags
            by_priority[r.priority] += r.flags
        return {"policy_hash": p.policy_hash, "flags_raised": t.flags, "patients_affected": t.patients,
                "flags_per_1000_results": t.per_1000_results, "flags_per_patient_day": t.per_patient_day,
                "median_seconds_result_to_flag": t.median_seconds, "p90_seconds_result_to_flag": t.p90_seconds,
                "escalations_if_never_acknowledged": t.escalations, "flags_by_rule": dict(sorted(by_rule.items())),
                "flags_by_raised_priority": dict(sorted(by_priority.items()))}

    gained = Counter(d.flag.rule for d in c.differences if d.change == "gained")
    lost = Counter(d.flag.rule for d in c.differences if d.change == "lost")
    content = {
        "start": fhir_instant(c.start), "end": fhir_instant(c.end), "results_stored": c.results_stored,
        "patient_days": c.patient_days, "baseline": side(c.baseline), "candidate": side(c.candidate),
        "flags_gained": {"count": sum(gained.values()), "by_rule": dict(sorted(gained.items()))},
        "flags_lost": {"count": sum(lost.values()), "by_rule": dict(sorted(lost.items()))},
        "gained_by_raised_priority": dict(sorted(Counter(priority_code(d.flag.raised_priority)
                                                          for d in c.differences if d.change == "gained").items())),
        "assumptions": " ".join(ASSUMPTIONS), "caution": CAUTION,
    }
    return as_parameters(content, typed={"start": "valueInstant", "end": "valueInstant"})
