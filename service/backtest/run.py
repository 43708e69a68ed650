"""Runs a backtest over a store: patients in chunks, each chunk read once and simulated under both
policies, chunks spread over worker processes (the rules are pure per patient, so patients are
independent). Memory stays bounded by one chunk per worker plus the simulated Flags."""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from datetime import datetime, timedelta

from service.backtest.compare import Comparison, burden_denominators, compare
from service.backtest.engine import SimFlag, simulate
from service.backtest.load import histories, patients_with_arrivals
from service.db.engine import Database
from service.policy import Policy, policy_hash

__all__ = ["Backtest", "run_backtest"]

_CHUNK = 100  # patients per unit of work: memory stays flat and the workers stay evenly loaded


@dataclass(frozen=True)
class Backtest:
    """What to run: two policies over [start, end) of one store."""

    database_url: str
    baseline: Policy
    candidate: Policy
    start: datetime
    end: datetime
    lookback: timedelta
    tick: timedelta = timedelta(minutes=15)
    workers: int = 1


@dataclass(frozen=True, slots=True)
class _ChunkResult:
    baseline: list[SimFlag]
    candidate: list[SimFlag]
    results: int
    patient_days: int
    evaluations: int


_DB: dict[str, Database] = {}  # one engine per worker process


def _database(url: str) -> Database:
    if url not in _DB:
        _DB[url] = Database(url)
    return _DB[url]


def _run_chunk(job: Backtest, keys: Sequence[str]) -> _ChunkResult:
    db = _database(job.database_url)
    with db.session() as session:
        stored = histories(session=session, patient_keys=keys, since=job.start - job.lookback, before=job.end)
    base: list[SimFlag] = []
    cand: list[SimFlag] = []
    results = patient_days = evaluations = 0
    for history in stored:
        r, d = burden_denominators(history.stored, job.start, job.end)
        results, patient_days = results + r, patient_days + d
        for policy, into in ((job.baseline, base), (job.candidate, cand)):
            run = simulate(history, policy, lookback=job.lookback, end=job.end, tick=job.tick,
                           count_from=job.start)
            into.extend(run.flags)
            evaluations += run.evaluations
    return _ChunkResult(base, cand, results, patient_days, evaluations)


def _chunks(keys: Sequence[str]) -> Iterator[Sequence[str]]:
    for i in range(0, len(keys), _CHUNK):
        yield keys[i : i + _CHUNK]


def run_backtest(job: Backtest) -> Comparison:
    """The comparison of the two policies over the job's range."""
    db = Database(job.database_url)
    try:
        with db.session() as session:
            keys = patients_with_arrivals(session=session, since=job.start - job.lookback, before=job.end)
    finally:
        db.dispose()
    parts: list[_ChunkResult]
    workers = max(1, min(job.workers, os.cpu_count() or 1))
    if workers == 1:
        parts = [_run_chunk(job, chunk) for chunk in _chunks(keys)]
    else:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            parts = list(pool.map(_run_chunk, [job] * len(range(0, len(keys), _CHUNK)), _chunks(keys)))
    return compare(
        baseline=[f for p in parts for f in p.baseline], candidate=[f for p in parts for f in p.candidate],
        hashes=(policy_hash(job.baseline), policy_hash(job.candidate)),
        results=sum(p.results for p in parts), patient_days=sum(p.patient_days for p in parts),
        evaluations=sum(p.evaluations for p in parts), start=job.start, end=job.end,
    )
