"""Outgoing FHIR JSON: OperationOutcome, response and search Bundles. Pure functions of their inputs."""

from __future__ import annotations

import uuid
from collections.abc import Sequence
from datetime import datetime
from typing import Any

import orjson

from service.errors import Issue

__all__ = [
    "CAUTION",
    "FHIR_JSON",
    "fhir_instant",
    "operation_outcome",
    "response_bundle",
    "searchset",
    "status_line",
]

FHIR_JSON = "application/fhir+json"
CAUTION = (
    "Decision support only: thresholds are site policy; defer to local protocols and licensed clinicians."
)
_REASONS = {200: "OK", 201: "Created", 400: "Bad Request", 401: "Unauthorized", 403: "Forbidden",
            404: "Not Found", 405: "Method Not Allowed", 409: "Conflict",
            412: "Precondition Failed", 413: "Payload Too Large", 415: "Unsupported Media Type",
            422: "Unprocessable Entity", 500: "Internal Server Error"}


def status_line(code: int) -> str:
    return f"{code} {_REASONS.get(code, '')}".strip()


def fhir_instant(when: datetime) -> str:
    return when.isoformat().replace("+00:00", "Z")


def operation_outcome(issues: Sequence[Issue]) -> dict[str, Any]:
    """An OperationOutcome with one issue per Issue (FHIRPath in ``expression``)."""
    out = []
    for i in issues or [Issue("informational", "all ok", severity="information")]:
        item: dict[str, Any] = {"severity": i.severity, "code": i.code, "diagnostics": i.message}
        if i.expression:
            item["expression"] = list(i.expression)
        out.append(item)
    return {"resourceType": "OperationOutcome", "issue": out}


def response_bundle(
    kind: str, results: Sequence[Any], *, representation: bool, now: datetime
) -> dict[str, Any]:
    """A ``batch-response`` or ``transaction-response`` Bundle, one entry per request entry in order."""
    entries = []
    for r in results:
        response: dict[str, Any] = {"status": status_line(r.status)}
        if r.location:
            response["location"] = r.location
        if r.version_id is not None:
            response["etag"] = f'W/"{r.version_id}"'
        if r.last_modified is not None:
            response["lastModified"] = fhir_instant(r.last_modified)
        if r.issues:
            response["outcome"] = operation_outcome(r.issues)
        entry: dict[str, Any] = {"response": response}
        if representation and r.body:
            entry["resource"] = orjson.loads(r.body)
        entries.append(entry)
    return {
        "resourceType": "Bundle",
        "id": str(uuid.uuid4()),
        "type": f"{kind}-response",
        "timestamp": fhir_instant(now),
        "entry": entries,
    }


def searchset(
    resources: Sequence[dict[str, Any]],
    *,
    base: str,
    links: dict[str, str],
    total: int | None,
    now: datetime,
    included: Sequence[dict[str, Any]] = (),
    outcome: Sequence[Issue] = (),
) -> dict[str, Any]:
    """A searchset; ``outcome`` issues (what was left out, and why) come as an OperationOutcome entry with
    search mode ``outcome``."""
    bundle: dict[str, Any] = {
        "resourceType": "Bundle",
        "id": str(uuid.uuid4()),
        "type": "searchset",
        "timestamp": fhir_instant(now),
        "link": [{"relation": rel, "url": url} for rel, url in links.items()],
        "entry": [
            {"fullUrl": f"{base}/{r['resourceType']}/{r['id']}", "resource": r, "search": {"mode": mode}}
            for rs, mode in ((resources, "match"), (included, "include"))
            for r in rs
        ],
    }
    if outcome:
        bundle["entry"].append({"fullUrl": f"urn:uuid:{uuid.uuid4()}", "resource": operation_outcome(outcome),
                                "search": {"mode": "outcome"}})
    if total is not None:
        bundle["total"] = total
    return bundle
