"""An NDJSON feed stored the way the live path stores it, so the backtest reads it like any history.

Each resource is ingested (validated and normalised once, as it is not yet stored) into an embedded
SQLite store under a clock standing at its arrival (service.demo: its issued time, or 30 min after
collection, never earlier than the one before), with the scheduler's recheck after each, exactly as
``lytestream demo`` replays it. No HTTP.
"""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

from service.clock import FixedClock
from service.config import Settings
from service.demo import read_feed, replay
from service.main import build_context

__all__ = ["store_feed"]


def store_feed(feed: Path, data_dir: Path) -> tuple[str, int, int]:
    """(database URL, resources read, resources stored) of ``feed`` stored in a new store in ``data_dir``."""
    arrivals = read_feed(feed)
    clock = FixedClock(arrivals[0][0] if arrivals else datetime.now(UTC))
    ctx = build_context(Settings(data_dir=data_dir, scheduler=False), clock=clock)
    try:
        # The demo's replay: the live path's Flags are stored too, so the baseline can be checked against them.
        stored = replay(ctx, clock, arrivals)
        return ctx.settings.resolved_database_url, len(arrivals), stored
    finally:
        ctx.db.dispose()
