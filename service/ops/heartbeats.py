"""When each time-driven job last ran in this process: what /healthz reports.

A job that has not finished a run for several of its intervals is stuck (a hung send, a lock never
released) or its scheduler is dead; /healthz then answers 503 so a supervisor can restart the process.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

__all__ = ["Heartbeats"]

# Stale after this many intervals plus a margin: one slow run (a long delivery pass) is not a stall.
_MISSED_INTERVALS = 3
_MARGIN = timedelta(seconds=60)


@dataclass
class Heartbeats:
    started: datetime | None = None
    _last: dict[str, tuple[datetime, bool]] = field(default_factory=dict)
    _intervals: dict[str, timedelta] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def expect(self, job: str, every: timedelta, now: datetime) -> None:
        """``job`` runs every ``every`` in this process from ``now`` on."""
        with self._lock:
            self._intervals[job] = every
            self.started = self.started or now

    def beat(self, job: str, at: datetime, ok: bool) -> None:
        with self._lock:
            self._last[job] = (at, ok)

    def report(self, now: datetime) -> tuple[bool, dict[str, Any]]:
        """(healthy, what /healthz shows): per job its last run, age in seconds, outcome and whether stale."""
        jobs: dict[str, Any] = {}
        healthy = True
        with self._lock:
            for job, every in sorted(self._intervals.items()):
                last = self._last.get(job)
                since = last[0] if last else self.started
                age = (now - since).total_seconds() if since else 0.0
                stale = age > (every * _MISSED_INTERVALS + _MARGIN).total_seconds()
                healthy = healthy and not stale
                jobs[job] = {"last_run": last[0].isoformat().replace("+00:00", "Z") if last else None,
                             "age_seconds": round(age, 1), "last_ok": last[1] if last else None,
                             "interval_seconds": every.total_seconds(), "stale": stale}
        return healthy, jobs
