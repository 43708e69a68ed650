"""Time-driven work, on APScheduler: what no incoming request would trigger.

Each job is idempotent and safe when several replicas run it: re-evaluation takes the patient's lock
and writes only what differs from the stored flags, so a second run finds nothing to change.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import TYPE_CHECKING

from apscheduler.schedulers.background import BackgroundScheduler

if TYPE_CHECKING:
    from service.api.context import AppContext

__all__ = ["JOBS", "run_job", "start_scheduler"]

log = logging.getLogger("lytestream.jobs")


def recheck_flags(ctx: AppContext) -> int:
    """Re-evaluate patients whose flags may change with time alone (e.g. a potassium recheck due)."""
    return ctx.evaluator.recheck(ctx.db, ctx.clock.now())


def deliver_outbox(ctx: AppContext) -> int:
    """Send the queued notifications that are due (retries included), in order per subscription."""
    return ctx.dispatcher.run_once()


def queue_heartbeats(ctx: AppContext) -> int:
    """Queue a heartbeat for each idle subscription whose heartbeat period has passed."""
    from service.db.subscriptions import enqueue_heartbeats

    with ctx.db.session(write=True) as session:
        return enqueue_heartbeats(session=session, now=ctx.clock.now())


def escalate_flags(ctx: AppContext) -> int:
    """Announce unacknowledged Flags of the escalated priorities on the escalation topic, once per
    interval of their priority."""
    return ctx.evaluator.escalate(ctx.db, ctx.clock.now())


def purge_retention(ctx: AppContext) -> int:
    """Purge raw requests and AuditEvents past the retention period, when one is set."""
    from service.retention import purge_expired

    if ctx.settings.retention_days is None:
        return 0
    return purge_expired(ctx.db, days=ctx.settings.retention_days, now=ctx.clock.now(),
                         base_url=ctx.settings.base_url).total


JOBS: dict[str, Callable[[AppContext], int]] = {
    "recheck-flags": recheck_flags,
    "escalate-flags": escalate_flags,
    "queue-heartbeats": queue_heartbeats,
    "deliver-outbox": deliver_outbox,
    "purge-retention": purge_retention,
}
# Retention is counted in days: an hourly pass keeps each purge small.
_PURGE_SECONDS = 3600.0


def run_job(ctx: AppContext, name: str) -> int:
    changed = JOBS[name](ctx)
    log.info("job %s: %d flag change(s)", name, changed)
    return changed


def start_scheduler(ctx: AppContext) -> BackgroundScheduler:
    scheduler = BackgroundScheduler(timezone="UTC")
    for name in JOBS:
        # coalesce + one instance: a slow run is never stacked with the next.
        seconds = ctx.settings.deliver_seconds if name == "deliver-outbox" else ctx.settings.recheck_seconds
        if name == "purge-retention":
            seconds = _PURGE_SECONDS
        scheduler.add_job(run_job, "interval", seconds=seconds, args=(ctx, name), id=name,
                          coalesce=True, max_instances=1)
    scheduler.start()
    return scheduler
