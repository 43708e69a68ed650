"""Backtest jobs run for the API: one at a time per process, in a background thread, polled by id.

Jobs live in the memory of the process that accepted them, so a status URL is answered by that process
only (behind several workers or replicas, poll through a sticky route, or run the CLI); a finished job is
kept for ``KEEP`` and then forgotten.
"""

from __future__ import annotations

import threading
import uuid
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

__all__ = ["Job", "JobBoard"]

KEEP = timedelta(hours=24)
QUEUED = 4  # jobs waiting or running at once per process; more is refused as too costly


@dataclass
class Job:
    id: str
    owner: str  # the client that asked: only it may poll
    created: datetime
    status: str = "in-progress"  # in-progress | complete | failed
    result: dict[str, Any] | None = None
    error: str | None = None


class JobBoard:
    def __init__(self) -> None:
        self._jobs: dict[str, Job] = {}
        self._lock = threading.Lock()
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="backtest")

    def submit(self, owner: str, now: datetime, work: Callable[[], dict[str, Any]]) -> Job | None:
        """Start ``work``; None when ``QUEUED`` jobs are already waiting or running."""
        with self._lock:
            self._forget(now)
            if sum(1 for j in self._jobs.values() if j.status == "in-progress") >= QUEUED:
                return None
            job = Job(id=str(uuid.uuid4()), owner=owner, created=now)
            self._jobs[job.id] = job
        self._pool.submit(self._run, job, work)
        return job

    def _run(self, job: Job, work: Callable[[], dict[str, Any]]) -> None:
        try:
            result = work()
        except Exception as exc:  # reported on the status URL; never raised into the pool
            job.status, job.error = "failed", f"the backtest failed ({type(exc).__name__})"
        else:
            job.status, job.result = "complete", result

    def get(self, job_id: str) -> Job | None:
        with self._lock:
            return self._jobs.get(job_id)

    def cancel(self, job_id: str) -> bool:
        """Forget the job (a running one finishes unseen); False when there is none."""
        with self._lock:
            return self._jobs.pop(job_id, None) is not None

    def _forget(self, now: datetime) -> None:
        for jid in [j.id for j in self._jobs.values()
                    if j.status != "in-progress" and j.created + KEEP < now]:
            del self._jobs[jid]
