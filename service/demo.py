"""The demo: an invented ward's 48 h feed replayed through the real pipeline on an embedded SQLite store.

The clock moves with the feed (each resource "arrives" at its issued time, or 30 min after
collection, never earlier than the one before), so time-driven flags fire as they would live. At
the end the recheck job runs once at the scenario's close.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

import orjson

from service.clock import FixedClock
from service.config import Settings
from service.db.reads import FlagQuery, search_flags
from service.fhir.normalise import parse_datetime
from service.ingest import EntryRequest
from service.main import build_context

if TYPE_CHECKING:
    from service.api.context import AppContext

__all__ = ["DEFAULT_FEED", "DemoFlag", "read_feed", "replay", "run_demo"]

DEFAULT_FEED = Path(__file__).resolve().parents[1] / "fixtures" / "demo" / "ward.ndjson"
_TRANSIT = timedelta(minutes=30)


@dataclass(frozen=True)
class DemoFlag:
    patient: str
    rule: str
    priority: str
    status: str
    start: str
    sentence: str


def _arrivals(lines: list[dict[str, Any]]) -> Iterator[tuple[datetime, dict[str, Any]]]:
    """Each resource with its arrival time, never earlier than the one before."""
    clock: datetime | None = None
    for resource in lines:
        when = _arrival(resource)
        clock = when if clock is None or when > clock else clock
        yield clock, resource


def _arrival(resource: dict[str, Any]) -> datetime:
    if resource.get("issued"):
        return parse_datetime(resource["issued"])
    for key in ("effectiveDateTime", "effectiveInstant"):
        if key in resource:
            return parse_datetime(resource[key]) + _TRANSIT
    period = resource.get("effectivePeriod") or {}
    stamp = period.get("end") or period.get("start")
    return parse_datetime(stamp) + _TRANSIT if stamp else datetime(2000, 1, 1, tzinfo=UTC)


def read_feed(feed: Path) -> list[tuple[datetime, dict[str, Any]]]:
    """The feed's resources with the time each arrives."""
    lines = [orjson.loads(line) for line in feed.read_bytes().splitlines() if line.strip()]
    return list(_arrivals(lines))


def replay(ctx: AppContext, clock: FixedClock, arrivals: list[tuple[datetime, dict[str, Any]]],
           end: datetime | None = None, between: Callable[[int], None] | None = None) -> int:
    """Send each resource at its arrival time, running the time-driven recheck as the scheduler would;
    ``between(i)`` runs after resource i (tests use it to deliver or to break the receiver). Returns
    the number of resources stored."""
    stored = 0
    for i, (when, resource) in enumerate(arrivals):
        clock.set(max(when, clock.now()))
        result = ctx.ingestor.batch([EntryRequest(root="Bundle.entry[0].resource", resource=resource)],
                                    raw=orjson.dumps(resource))[0]
        stored += result.status in (200, 201) and result.location is not None
        ctx.evaluator.recheck(ctx.db, clock.now())
        if between is not None:
            between(i)
    close = end or (arrivals[-1][0] if arrivals else clock.now())
    clock.set(max(close, clock.now()))
    ctx.evaluator.recheck(ctx.db, clock.now())
    return stored


def run_demo(feed: Path, data_dir: Path, end: datetime | None = None) -> tuple[list[DemoFlag], int, int]:
    """Replay ``feed`` into a fresh store in ``data_dir``; returns every flag, entries sent and stored."""
    arrivals = read_feed(feed)
    clock = FixedClock(arrivals[0][0] if arrivals else datetime.now(UTC))
    ctx = build_context(Settings(data_dir=data_dir, scheduler=False), clock=clock)
    try:
        stored = replay(ctx, clock, arrivals, end)
        with ctx.db.session() as session:
            rows, _ = search_flags(session=session, q=FlagQuery(sort="date", count=10_000))
    finally:
        ctx.db.dispose()
    flags = []
    for row in rows:
        f = orjson.loads(row)
        subject = f["subject"].get("reference") or f["subject"].get("identifier", {}).get("value", "?")
        priority = next(e["valueCodeableConcept"]["coding"][0]["code"] for e in f["extension"]
                        if e["url"].endswith("flag-priority"))
        flags.append(DemoFlag(patient=subject, rule=f["code"]["coding"][0]["code"], priority=priority,
                              status=f["status"], start=f["period"]["start"], sentence=f["code"]["text"]))
    flags.sort(key=lambda d: (d.patient, d.start, d.rule))
    return flags, len(arrivals), stored


# Date-time elements the demo feed uses; shifting them all by one amount keeps every interval (and
# so every Flag) the same while the scenario's close becomes "now" for a live board.
_TIMES = frozenset({"effectiveDateTime", "effectiveInstant", "issued", "start", "end"})


def shifted(resource: Any, by: timedelta) -> Any:
    """A copy of ``resource`` with every date-time in it moved by ``by``."""
    if isinstance(resource, dict):
        return {k: (_shift_time(v, by) if k in _TIMES and isinstance(v, str) else shifted(v, by))
                for k, v in resource.items()}
    if isinstance(resource, list):
        return [shifted(v, by) for v in resource]
    return resource


def _shift_time(value: str, by: timedelta) -> str:
    if "T" not in value:
        return value
    return (parse_datetime(value) + by).isoformat()


DEMO_BOARD_SCOPE = "system/Flag.rus system/Observation.rs system/MedicationAdministration.rs"


def prepare_live_demo(feed: Path, data_dir: Path, end: datetime, now: datetime) -> tuple[int, str]:
    """Load the feed into ``data_dir`` as if its close were ``now``, and mint a token for the board.
    Returns the number of resources stored and the token."""
    from service.auth.tokens import mint

    by = now - end
    arrivals = [(when + by, shifted(resource, by)) for when, resource in read_feed(feed)]
    clock = FixedClock(arrivals[0][0] if arrivals else now)
    ctx = build_context(Settings(data_dir=data_dir, scheduler=False), clock=clock)
    try:
        stored = replay(ctx, clock, arrivals, now)
        with ctx.db.session(write=True) as session:
            token = mint(session, client="demo-board", scope=DEMO_BOARD_SCOPE, now=now)
    finally:
        ctx.db.dispose()
    return stored, token
