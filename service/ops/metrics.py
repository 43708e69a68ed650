"""The Prometheus metrics, and the collectors that read the database when scraped.

Labels are bounded on purpose: route templates (never raw paths), rule codes, priorities, outcome
words, job names, subscription ids and client ids (one per configured feed or subscriber). Nothing
here ever carries a patient identifier or a value.

Counters live in the process that counted them. With several uvicorn workers `lytestream serve`
points prometheus_client's multiprocess mode at a directory (``metrics_multiprocess_dir``), so a
scrape of any worker sums them all; the database-backed gauges are read at scrape time and need no
sharing.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from prometheus_client.core import GaugeMetricFamily
from prometheus_client.multiprocess import MultiProcessCollector
from prometheus_client.registry import Collector
from sqlalchemy import event, func, select
from sqlalchemy.orm import Session

if TYPE_CHECKING:
    from service.clock import Clock
    from service.db.engine import Database

__all__ = [
    "DELIVERY_ATTEMPTS",
    "ESCALATIONS",
    "FLAG_CHANGES",
    "INGEST_RESULTS",
    "JOB_LAG",
    "JOB_RUNS",
    "REQUEST_SECONDS",
    "WRITER_WAIT",
    "after_commit",
    "change_word",
    "exposition",
]

INGEST_RESULTS = Counter(
    "lytestream_ingest_results", "Resources received for ingest, by outcome and sending client",
    ["outcome", "client"])
REQUEST_SECONDS = Histogram(
    "lytestream_http_request_duration_seconds", "Request latency by method, route template and status class",
    ["method", "route", "status"],
    buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0))
FLAG_CHANGES = Counter(
    "lytestream_flag_changes", "Flag versions written, by change (raised, updated, closed, withdrawn), rule "
    "and priority", ["change", "rule", "priority"])
DELIVERY_ATTEMPTS = Counter(
    "lytestream_delivery_attempts", "Notification sends, by kind and outcome (ok, retry, gave-up)",
    ["kind", "outcome"])
ESCALATIONS = Counter("lytestream_escalations", "Escalation notifications queued")
JOB_RUNS = Counter("lytestream_job_runs", "Scheduler job runs, by job and outcome", ["job", "outcome"])
JOB_LAG = Histogram(
    "lytestream_job_lag_seconds", "How late a scheduler job started after its scheduled time", ["job"],
    buckets=(0.01, 0.05, 0.1, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0))
WRITER_WAIT = Histogram(
    "lytestream_db_writer_wait_seconds", "Time a write unit of work queued for the SQLite writer lock",
    buckets=(0.0005, 0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0))

# What a Flag version's kind, as the writer names it, counts as.
_CHANGE_WORDS = {"create": "raised", "reactivate": "reopened", "update": "updated", "close": "closed",
                 "withdraw": "withdrawn"}


def change_word(kind: str) -> str:
    return _CHANGE_WORDS.get(kind, kind)


def after_commit(session: Session, count: Callable[[], object]) -> None:
    """Count once the unit of work commits: a rolled-back attempt (a lost race run again) counts nothing."""
    event.listen(session, "after_commit", lambda _session: count(), once=True)


class StoreCollector(Collector):
    """Read at scrape time: the outbox per subscription and the connection pool of this process."""

    def __init__(self, db: Database, clock: Clock) -> None:
        self.db = db
        self.clock = clock

    def collect(self) -> Iterator[GaugeMetricFamily]:
        from service.db.tables import SubscriptionEvent, SubscriptionRecord

        e = SubscriptionEvent.__table__  # type: ignore[attr-defined]
        s = SubscriptionRecord.__table__  # type: ignore[attr-defined]
        depth = GaugeMetricFamily("lytestream_outbox_depth", "Notifications queued, not yet sent, per subscription",
                                  labels=["subscription", "status"])
        age = GaugeMetricFamily("lytestream_outbox_oldest_age_seconds",
                                "Age of the oldest queued notification per subscription (0 when none)",
                                labels=["subscription", "status"])
        pending = (select(e.c.subscription_id, func.count().label("n"), func.min(e.c.created_at).label("oldest"))
                   .where(e.c.status == "pending").group_by(e.c.subscription_id).subquery())
        query = (select(s.c.id, s.c.status, pending.c.n, pending.c.oldest)
                 .outerjoin(pending, pending.c.subscription_id == s.c.id).where(s.c.status != "deleted"))
        now = self.clock.now()
        with self.db.session() as session:
            rows = session.execute(query).all()
        for sid, status, n, oldest in rows:
            depth.add_metric([sid, status], float(n or 0))
            age.add_metric([sid, status], _age(now, oldest))
        yield depth
        yield age
        pool = self.db.engine.pool
        used = GaugeMetricFamily("lytestream_db_pool_connections", "Database connections of this process",
                                 labels=["state"])
        checked_out = getattr(pool, "checkedout", None)
        checked_in = getattr(pool, "checkedin", None)
        if callable(checked_out) and callable(checked_in):
            used.add_metric(["in-use"], float(checked_out()))
            used.add_metric(["idle"], float(checked_in()))
        size = getattr(pool, "size", None)
        if callable(size):
            used.add_metric(["size"], float(size()))
        yield used


def _age(now: datetime, oldest: datetime | None) -> float:
    if oldest is None:
        return 0.0
    if oldest.tzinfo is None:  # SQLite hands back naive UTC through some paths
        from datetime import timezone

        oldest = oldest.replace(tzinfo=timezone.utc)
    return max(0.0, (now - oldest).total_seconds())


def exposition(db: Database, clock: Clock, multiprocess_dir: Path | None) -> bytes:
    """The Prometheus text of this process (or, in multiprocess mode, of every worker) and the store."""
    registry = CollectorRegistry()
    if multiprocess_dir is not None:
        MultiProcessCollector(registry, path=str(multiprocess_dir))  # type: ignore[no-untyped-call]
    else:
        # Ours only: the default registry's process and platform collectors are not what this service
        # is alerted on.
        for collector in (INGEST_RESULTS, REQUEST_SECONDS, FLAG_CHANGES, DELIVERY_ATTEMPTS, ESCALATIONS,
                          JOB_RUNS, JOB_LAG, WRITER_WAIT):
            registry.register(collector)
    registry.register(StoreCollector(db, clock))
    return generate_latest(registry)
