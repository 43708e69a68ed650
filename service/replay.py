"""Replay FHIR NDJSON into a running service as idempotent transaction Bundles.

Each resource goes as a conditional update on its first identifier, so replaying a file twice
changes nothing. A transaction that is refused is sent again as a batch, so the good lines land
and each bad line is reported with its line number.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import orjson
from rich.console import Console
from rich.progress import Progress

__all__ = ["ReplaySummary", "replay_file", "to_entry"]

_HEADERS = {"content-type": "application/fhir+json", "accept": "application/fhir+json"}


@dataclass
class ReplaySummary:
    """What became of each line: stored, recorded (Patient identities), dropped or refused."""

    total: int = 0
    stored: int = 0  # a result or administration held now (created, updated or already held)
    recorded: int = 0  # Patient entries: identifiers recorded, nothing else kept
    dropped: int = 0  # answered 2xx but not stored: not watched (the answer says why)
    refused: int = 0  # answered 4xx/5xx, or not a FHIR resource
    errors: list[str] = field(default_factory=list)  # one line per refusal
    warnings: list[str] = field(default_factory=list)  # drops the service thinks are mistakes (e.g. a code typo)

    def headline(self) -> str:
        """One line: what became of the entries. A dropped entry is never called accepted."""
        mistyped = f"; {len(self.warnings)} of them under a likely mistyped code, listed below" if self.warnings else ""
        return (f"{self.total} entries: stored {self.stored}, patient identities {self.recorded}, "
                f"dropped {self.dropped} (not watched{mistyped}), refused {self.refused}")


def to_entry(resource: dict[str, Any]) -> dict[str, Any]:
    """A Bundle entry that makes a resend harmless: PUT by identifier where there is one."""
    rtype = resource.get("resourceType", "")
    for ident in resource.get("identifier") or ():
        if ident.get("system") and ident.get("value"):
            url = f"{rtype}?identifier={ident['system']}|{ident['value']}"
            return {"resource": resource, "request": {"method": "PUT", "url": url}}
    return {"resource": resource, "request": {"method": "POST", "url": rtype}}


def _chunks(path: Path, size: int, summary: ReplaySummary) -> Iterator[list[tuple[int, dict[str, Any]]]]:
    chunk: list[tuple[int, dict[str, Any]]] = []
    with path.open("rb") as fh:
        for number, line in enumerate(fh, start=1):
            if not line.strip():
                continue
            summary.total += 1
            try:
                resource = orjson.loads(line)
                if not isinstance(resource, dict):
                    raise ValueError("not a JSON object")
            except ValueError as exc:
                summary.refused += 1
                summary.errors.append(f"line {number}: not a FHIR resource ({exc})")
                continue
            chunk.append((number, resource))
            if len(chunk) == size:
                yield chunk
                chunk = []
    if chunk:
        yield chunk


def _describe(outcome: dict[str, Any], severities: tuple[str, ...] = ("error", "fatal")) -> str:
    issues = outcome.get("issue") or []
    return "; ".join(f"{i.get('diagnostics', i.get('code'))} at {','.join(i.get('expression', []))}"
                     for i in issues if i.get("severity") in severities)


def replay_file(path: Path, base_url: str, *, bundle_size: int, console: Console,
                client: httpx.Client | None = None, token: str | None = None) -> ReplaySummary:
    summary = ReplaySummary()
    own = client is None
    auth = {"Authorization": f"Bearer {token}"} if token else {}
    http = client or httpx.Client(timeout=60.0, headers=auth)
    try:
        with Progress(console=console, transient=True) as progress:
            task = progress.add_task("replaying", total=None)
            for chunk in _chunks(path, bundle_size, summary):
                _send(http, base_url, chunk, summary)
                progress.update(task, advance=len(chunk))
    finally:
        if own:
            http.close()
    return summary


def _send(http: httpx.Client, base_url: str, chunk: list[tuple[int, dict[str, Any]]],
          summary: ReplaySummary) -> None:
    entries = [to_entry(r) for _, r in chunk]
    bundle = {"resourceType": "Bundle", "type": "transaction", "entry": entries}
    response = http.post(base_url.rstrip("/"), content=orjson.dumps(bundle), headers=_HEADERS)
    if response.status_code != 200:
        # Find the bad lines: the same entries as a batch, judged one by one.
        bundle["type"] = "batch"
        response = http.post(base_url.rstrip("/"), content=orjson.dumps(bundle), headers=_HEADERS)
    if response.status_code != 200:
        summary.refused += len(chunk)
        summary.errors.append(f"lines {chunk[0][0]}-{chunk[-1][0]}: HTTP {response.status_code} "
                              f"{_describe(response.json()) if response.content else ''}")
        return
    for (number, resource), entry in zip(chunk, response.json().get("entry", []), strict=False):
        _count(summary, number, resource, entry.get("response", {}))


def _count(summary: ReplaySummary, number: int, resource: dict[str, Any], response: dict[str, Any]) -> None:
    status = str(response.get("status", ""))
    outcome = response.get("outcome", {})
    if not status.startswith("2"):
        summary.refused += 1
        summary.errors.append(f"line {number}: {status} {_describe(outcome)}")
    elif response.get("location"):
        summary.stored += 1
    elif resource.get("resourceType") == "Patient":
        summary.recorded += 1
    else:
        summary.dropped += 1
        warned = _describe(outcome, ("warning",))
        if warned:
            summary.warnings.append(f"line {number}: not stored: {warned}")
