"""Backtest benchmark: stored results re-evaluated under two policies, against the live ingest path.

    python -m bench.backtest_benchmark [--results 1000000] [--workers 2] [--quick] [--profile]

Fills a fresh SQLite store with ``--results`` invented results (bench.prefill: the service's own
normaliser; about one five-test draw per patient per day over 90 days), then times
``service.backtest.run.run_backtest`` under the built-in policy and a candidate (sodium rise limits
8 mmol/L / 24 h) in a child process, sampling the resident memory of that process and its workers
(/proc, every 50 ms). The live path's rate is measured on the same machine: in-process
``Ingestor.transaction`` (bench.ingest_benchmark.inprocess_rate) on a small fresh feed.

Targets (not a test): 1,000,000 results under two policies in <= 60 s on 2 cores, peak RSS <= 500 MB.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import pstats
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path

import orjson

__all__ = ["main"]

TARGET_SECONDS = 60.0
TARGET_PEAK_RSS_MB = 500.0
_DEFAULT_POLICY = Path(__file__).resolve().parent.parent / "service" / "policy" / "default.toml"


def _candidate(work: Path) -> Path:
    text = _DEFAULT_POLICY.read_text("utf-8")
    for old, new in (("limit_24h = 10.0            #", "limit_24h = 8.0            #"),
                     ("limit_24h_after_first_day = 10.0", "limit_24h_after_first_day = 8.0")):
        assert text.count(old) == 1, old
        text = text.replace(old, new)
    path = work / "candidate.toml"
    path.write_text(text, "utf-8")
    return path


def _prefill(url: str, *, stored: int, patients: int, seed: int, per_result: bool) -> int:
    """bench.prefill's store; unless ``per_result``, each draw's results are then made one unit of work
    (one received request, one arrival time), as a lab interface sends a panel in one message."""
    from sqlalchemy import create_engine, text

    from bench.prefill import prefill_store

    count = prefill_store(url, stored=stored, patients=patients, seed=seed)
    if per_result:
        return count
    engine = create_engine(url)
    with engine.begin() as conn:
        # identifier values are "<prefix>-<draw>-<test>": the draw is the unit of work.
        conn.execute(text("CREATE TEMP TABLE draw AS SELECT substr(identifier_value, 1, "
                          "length(identifier_value) - 2) AS d, max(last_updated) AS at, min(rowid) AS req "
                          "FROM observation GROUP BY d"))
        conn.execute(text("CREATE INDEX draw_d ON draw (d)"))
        conn.execute(text("UPDATE observation SET last_updated = (SELECT at FROM draw WHERE d = "
                          "substr(identifier_value, 1, length(identifier_value) - 2))"))
        conn.execute(text("UPDATE fhir_version SET last_updated = o.last_updated, request_id = "
                          "(SELECT req FROM draw WHERE d = substr(o.identifier_value, 1, "
                          "length(o.identifier_value) - 2)) FROM observation o "
                          "WHERE fhir_version.resource_type = 'Observation' AND fhir_version.id = o.id"))
    engine.dispose()
    return count


def _memory_kb(pid: int) -> tuple[int, int]:
    """(RSS, PSS) of one process in kB. PSS shares each page among the processes mapping it, so the sum
    over forked workers is the memory they really hold together; summed RSS counts shared pages twice."""
    rss = pss = 0
    try:
        for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
            if line.startswith("Rss:"):
                rss = int(line.split()[1])
            elif line.startswith("Pss:"):
                pss = int(line.split()[1])
    except OSError:
        pass
    return rss, pss


def _tree(pid: int) -> list[int]:
    out = [pid]
    try:
        for task in Path(f"/proc/{pid}/task").iterdir():
            children = (task / "children").read_text().split()
            for child in children:
                out += _tree(int(child))
    except OSError:
        pass
    return out


class _Sampler(threading.Thread):
    """Peaks of this process tree: summed PSS, summed RSS, and the largest one process's RSS."""

    def __init__(self) -> None:
        super().__init__(daemon=True)
        self.pss_kb = self.rss_kb = self.one_kb = 0
        self.stop = threading.Event()

    def run(self) -> None:
        while not self.stop.is_set():
            sizes = [_memory_kb(p) for p in _tree(os.getpid())]
            self.rss_kb = max(self.rss_kb, sum(r for r, _ in sizes))
            self.pss_kb = max(self.pss_kb, sum(p for _, p in sizes))
            self.one_kb = max(self.one_kb, max((r for r, _ in sizes), default=0))
            self.stop.wait(0.05)


def _child(url: str, candidate: str, workers: int, profile: bool) -> int:
    """Run one backtest and print its figures as JSON (the parent reads them)."""
    from service.backtest.run import Backtest, run_backtest
    from service.policy import load_policy

    sampler = _Sampler()
    sampler.start()
    end = datetime.now(UTC) + timedelta(days=2)
    job = Backtest(database_url=url, baseline=load_policy(), candidate=load_policy(candidate),
                   start=end - timedelta(days=400), end=end, lookback=timedelta(hours=72), workers=workers)
    prof = cProfile.Profile() if profile else None
    t0 = time.perf_counter()
    if prof:
        prof.enable()
    comparison = run_backtest(job)
    if prof:
        prof.disable()
    seconds = time.perf_counter() - t0
    sampler.stop.set()
    sampler.join()
    figures = {"seconds": seconds, "peak_rss_mb": sampler.pss_kb / 1024, "summed_rss_mb": sampler.rss_kb / 1024,
               "one_process_rss_mb": sampler.one_kb / 1024, "load_average": os.getloadavg()[0], "results": comparison.results_stored,
               "patient_days": comparison.patient_days, "evaluations": comparison.evaluations,
               "baseline_flags": comparison.baseline.total.flags, "candidate_flags": comparison.candidate.total.flags,
               "gained": sum(d.change == "gained" for d in comparison.differences),
               "lost": sum(d.change == "lost" for d in comparison.differences)}
    if prof:
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).sort_stats("cumulative").print_stats(25)
        print(buf.getvalue(), file=sys.stderr)
    print(orjson.dumps(figures).decode())
    return 0


def _live_rate(work: Path, patients: int) -> float:
    from bench.feeds import ALL_RELEVANT, make_feed
    from bench.ingest_benchmark import inprocess_rate

    feed = make_feed("live", ALL_RELEVANT, results=5_000, patients=patients, bundle_size=100, seed=7)
    warm = make_feed("warm", ALL_RELEVANT, results=500, patients=patients, bundle_size=100, seed=8,
                     prefix="warm")
    return inprocess_rate(feed, warm, work)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--results", type=int, default=1_000_000, help="stored results to backtest")
    parser.add_argument("--workers", type=int, default=2, help="worker processes")
    parser.add_argument("--quick", action="store_true", help="100,000 results")
    parser.add_argument("--profile", action="store_true", help="cProfile the backtest (workers=1 is clearer)")
    parser.add_argument("--per-result", action="store_true",
                        help="each result its own unit of work (default: one per five-test draw)")
    parser.add_argument("--child", nargs=2, metavar=("URL", "CANDIDATE"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        return _child(args.child[0], args.child[1], args.workers, args.profile)
    results = 100_000 if args.quick else args.results
    patients = max(1, results // 450)  # one five-test draw a day for 90 days
    with tempfile.TemporaryDirectory(prefix="lytestream-backtest-bench-") as tmp:
        work = Path(tmp)
        url = f"sqlite:///{work / 'store.db'}"
        t0 = time.perf_counter()
        stored = _prefill(url, stored=results, patients=patients, seed=11, per_result=args.per_result)
        print(f"prefilled {stored:,} results over {patients:,} patients in {time.perf_counter() - t0:.0f} s "
              "(not timed below)", file=sys.stderr)
        child = subprocess.run([sys.executable, "-m", "bench.backtest_benchmark", "--child", url,
                                str(_candidate(work)), "--workers", str(args.workers),
                                *(["--profile"] if args.profile else [])],
                               check=True, stdout=subprocess.PIPE)
        figures = orjson.loads(child.stdout.splitlines()[-1])
        live = _live_rate(work, patients)
    seconds, rss = figures["seconds"], figures["peak_rss_mb"]
    rate = figures["results"] / seconds  # results re-evaluated per second, both policies
    unit = "each result its own unit of work" if args.per_result else "one unit of work per five-test draw"
    print(f"backtest: {figures['results']:,} results ({figures['patient_days']:,} patient-days; {unit}) under "
          f"two policies, {args.workers} worker(s), on {os.cpu_count()} cores")
    print(f"  {seconds:.1f} s ({rate:,.0f} results/s under both policies; {figures['evaluations']:,} rule "
          f"evaluations); peak memory {rss:.0f} MB PSS summed over the processes (RSS summed "
          f"{figures['summed_rss_mb']:.0f} MB, largest one process {figures['one_process_rss_mb']:.0f} MB); "
          f"1-min load average at the end {figures['load_average']:.1f}")
    print(f"  baseline {figures['baseline_flags']:,} Flags, candidate {figures['candidate_flags']:,} "
          f"({figures['gained']:,} gained, {figures['lost']:,} lost)")
    print(f"  live in-process ingest on this machine: {live:,.0f} results/s (one policy); backtest per "
          f"policy {rate * 2:,.0f} results/s = {rate * 2 / live:.1f}x the live path")
    scaled = seconds * 1_000_000 / max(figures["results"], 1)
    print(f"  target 1,000,000 in <= {TARGET_SECONDS:.0f} s: {'met' if scaled <= TARGET_SECONDS else 'missed'} "
          f"(scaled: {scaled:.0f} s); peak memory (PSS) <= {TARGET_PEAK_RSS_MB:.0f} MB: "
          f"{'met' if rss <= TARGET_PEAK_RSS_MB else 'missed'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
