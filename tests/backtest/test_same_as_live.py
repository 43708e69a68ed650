"""The backtest's baseline is the live path: the invented demo ward replayed through ingest (with the
scheduler's recheck) raises exactly the Flags the backtest simulates under the same policy."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

from sqlalchemy import select

from service.backtest.feed import store_feed
from service.backtest.run import Backtest, run_backtest
from service.db.engine import Database
from service.db.tables import FlagRecord
from service.demo import DEFAULT_FEED
from service.policy import load_policy


def test_baseline_simulation_raises_the_flags_the_live_path_stored(tmp_path: Path) -> None:
    url, _, _ = store_feed(DEFAULT_FEED, tmp_path)
    db = Database(url)
    with db.session() as session:
        live = {(r.patient_key, r.rule, r.episode) for r in session.execute(select(FlagRecord)).scalars()}
    db.dispose()
    policy = load_policy()
    job = Backtest(database_url=url, baseline=policy, candidate=policy,
                   start=datetime(2026, 2, 1, tzinfo=UTC), end=datetime(2026, 3, 4, tzinfo=UTC),
                   lookback=timedelta(hours=72), tick=timedelta(minutes=1))
    comparison = run_backtest(job)
    simulated = {f.key for f in comparison.baseline.flags}
    assert live and simulated == live
    assert comparison.differences == ()  # a policy compared with itself changes nothing
