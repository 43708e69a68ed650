"""Ingest benchmark: how fast lytestream takes in lab results, against the cost of validation alone.

    python -m bench.ingest_benchmark [--quick] [--stored N]
    python -m bench.ingest_benchmark --profile [--results N]

From one run on the same generated feeds it measures, for an all-relevant feed and a basic
metabolic panel feed (five of eight results watched):

* validation-only: fhir.resources R4B ``Observation.model_validate`` of every result (the floor
  a validating service cannot go under, and what a service that validates everything pays);
* in-process ingest: ``Ingestor.transaction`` on a fresh SQLite store, no HTTP;
* HTTP ingest: transaction Bundles over concurrent keep-alive connections to a uvicorn server
  subprocess on loopback, fresh SQLite store; p50/p99 request latency and the server's peak RSS;

then HTTP ingest of the all-relevant feed again into a store pre-filled with N results, and the
ratios against the targets. Every count the server reports is checked against the store.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import platform
import pstats
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson

from bench.feeds import ALL_RELEVANT, BASIC_PANEL, Analyte, Feed, make_feed
from bench.http_load import LoadResult, machine_busy_seconds, percentile, run_load, send_sequentially, server
from bench.prefill import count_observations, prefill_store

__all__ = ["main"]

REPO_ROOT = Path(__file__).resolve().parent.parent

# Targets for HTTP ingest (results/s) as multiples of the reference rates, and the memory ceiling.
TARGET_ALL_RELEVANT_VS_VALIDATION = 0.5
TARGET_PANEL_VS_VALIDATION = 1.5
TARGET_STORED_VS_EMPTY = 0.8
TARGET_PEAK_RSS_MB = 250.0


@dataclass(frozen=True)
class Sizes:
    results: int  # per feed
    stored: int
    patients: int  # patients of the feeds
    stored_patients: int  # patients of the pre-filled history
    bundle_size: int
    clients: int


@dataclass(frozen=True)
class HttpFigures:
    rate: float
    p50_ms: float
    p99_ms: float
    peak_rss_mb: float
    requests: int
    seconds: float
    server_cpu_s: float
    client_cpu_s: float
    machine_cpu_s: float

    @property
    def other_cores(self) -> float:
        """Cores used by other processes meanwhile: a sign the figures were disturbed."""
        return max(0.0, self.machine_cpu_s - self.server_cpu_s - self.client_cpu_s) / self.seconds


@dataclass(frozen=True)
class FeedFigures:
    feed: Feed
    validation_rate: float
    inprocess_rate: float
    http: HttpFigures
    inprocess_no_rules_rate: float  # the same path with re-evaluation off: what the rules cost


class CheckFailed(RuntimeError):
    """The service did not store what it said it stored: the figures would mean nothing."""


# -- measurements -------------------------------------------------------------------------------

def _best_of(repeats: int, run: Callable[[], float]) -> float:
    """Seconds of the fastest of ``repeats`` runs: the least disturbed by the rest of the machine."""
    return min(run() for _ in range(repeats))


def validation_rate(feed: Feed, warm: Feed) -> float:
    """Results/s of R4B Observation.model_validate alone, on dicts parsed by orjson."""
    from fhir.resources.R4B.observation import Observation

    for raw in warm.results:  # the first validations build the model's validators
        Observation.model_validate(orjson.loads(raw))
    dicts = [orjson.loads(raw) for raw in feed.results]

    def run() -> float:
        t0 = time.perf_counter()
        for d in dicts:
            Observation.model_validate(d)
        return time.perf_counter() - t0

    return feed.size / _best_of(3, run)


def _entries(bundle: bytes) -> list[Any]:
    """EntryRequests of a transaction Bundle, as the POST /fhir route builds them."""
    from service.ingest import EntryRequest

    body = orjson.loads(bundle)
    return [
        EntryRequest(root=f"Bundle.entry[{i}].resource", resource=e.get("resource"),
                     method=str(e["request"]["method"]), url=e["request"].get("url"),
                     if_none_exist=e["request"].get("ifNoneExist"), full_url=e.get("fullUrl"))
        for i, e in enumerate(body["entry"])
    ]


def _fresh_ingestor(data_dir: Path) -> Any:
    from service.config import Settings
    from service.main import build_context

    return build_context(Settings(data_dir=data_dir))


def _check_transaction(results: Sequence[Any], sent: int) -> int:
    if len(results) != sent:
        raise CheckFailed(f"transaction answered {len(results)} entries for {sent} sent")
    bad = [r.status for r in results if r.status not in (200, 201)]
    if bad:
        raise CheckFailed(f"transaction entries answered {bad[:5]}")
    return sum(1 for r in results if r.status == 201)


def inprocess_rate(feed: Feed, warm: Feed, work: Path, *, rules: bool = True) -> float:
    """Results/s of Ingestor.transaction over the feed's Bundles, fresh SQLite store, no HTTP.

    Bundles are parsed into entries before timing: parsing is the HTTP layer's share. ``rules=False``
    takes the re-evaluation hook out, to show what the rules and flags cost on the same data.
    """
    ctx = _fresh_ingestor(work / f"inproc-{feed.name}{'' if rules else '-no-rules'}")
    if not rules:
        ctx.ingestor.on_change = None
        ctx.ingestor.on_stored = None  # nor the own-window judgement of late results
    try:
        for raw in warm.bundles:
            ctx.ingestor.transaction(_entries(raw), raw=raw)
        prepared = [(raw, _entries(raw)) for raw in feed.bundles]
        created = 0
        t0 = time.perf_counter()
        for raw, entries in prepared:
            created += _check_transaction(ctx.ingestor.transaction(entries, raw=raw), len(entries))
        seconds = time.perf_counter() - t0
        _check_stored(count_observations(ctx.db.engine), feed.relevant + warm.relevant, created + warm.relevant,
                      f"in-process {feed.name}")
    finally:
        ctx.db.dispose()
    return feed.size / seconds


def _check_stored(in_store: int, expected: int, created: int, what: str) -> None:
    """The store must hold exactly the watched results sent, and the answers must say so."""
    if in_store != expected or created != expected:
        raise CheckFailed(f"{what}: {expected} results expected in the store, it holds {in_store}; "
                          f"the answers reported {created} created")


def http_figures(feed: Feed, warm: Feed, data_dir: Path, sizes: Sizes, *, already_stored: int = 0) -> HttpFigures:
    """HTTP ingest of the feed by a fresh server process on ``data_dir``; checked against the store."""
    with server(data_dir, cwd=REPO_ROOT) as srv:
        send_sequentially(srv, warm.bundles)
        cpu0 = srv.cpu_seconds()
        load: LoadResult = run_load(srv, feed.bundles, results=feed.size, clients=sizes.clients)
        server_cpu = srv.cpu_seconds() - cpu0
        peak = srv.peak_rss_mb()
    in_store = count_observations(f"sqlite:///{(data_dir / 'lytestream.db').as_posix()}")
    _check_stored(in_store - already_stored - warm.relevant, feed.relevant, load.created, f"HTTP {feed.name}")
    if load.created + load.acknowledged != feed.size:
        raise CheckFailed(f"HTTP {feed.name}: {feed.size} sent, {load.created + load.acknowledged} answered")
    return HttpFigures(rate=load.rate, p50_ms=percentile(load.latencies_ms, 50),
                       p99_ms=percentile(load.latencies_ms, 99), peak_rss_mb=peak, requests=load.requests,
                       seconds=load.seconds, server_cpu_s=server_cpu, client_cpu_s=load.client_cpu_s,
                       machine_cpu_s=load.machine_cpu_s)


def profile_inprocess(feed: Feed, warm: Feed, work: Path, top: int = 10) -> str:
    """cProfile of the in-process path on a fresh store (untimed: profiling slows it)."""
    ctx = _fresh_ingestor(work / "profile")
    try:
        for raw in warm.bundles:
            ctx.ingestor.transaction(_entries(raw), raw=raw)
        prepared = [(raw, _entries(raw)) for raw in feed.bundles]
        profiler = cProfile.Profile()
        profiler.enable()
        for raw, entries in prepared:
            ctx.ingestor.transaction(entries, raw=raw)
        profiler.disable()
    finally:
        ctx.db.dispose()
    out = io.StringIO()
    stats = pstats.Stats(profiler, stream=out)
    out.write(f"== profile: in-process ingest of {feed.size} results ({feed.name}), by cumulative time ==\n")
    stats.sort_stats("cumulative").print_stats(top)
    out.write("== by own time ==\n")
    stats.sort_stats("tottime").print_stats(top)
    out.write("== lytestream's own functions, by cumulative time ==\n")
    stats.sort_stats("cumulative").print_stats(r"service[/\\]", 2 * top)
    # Keep the report readable: show package-relative file names.
    return out.getvalue().replace(str(REPO_ROOT) + os.sep, "").replace(sys.prefix + os.sep, "")


# -- the run ------------------------------------------------------------------------------------

def _feeds(sizes: Sizes, seed: int) -> list[tuple[Feed, Feed]]:
    """(feed, warm-up feed) for each kind; warm-up identifiers never collide with the feed's."""
    kinds: list[tuple[str, tuple[Analyte, ...]]] = [("all-relevant", ALL_RELEVANT), ("panel", BASIC_PANEL)]
    out = []
    for offset, (name, panel) in enumerate(kinds):
        feed = make_feed(name, panel, results=sizes.results, patients=sizes.patients,
                         bundle_size=sizes.bundle_size, seed=seed + offset)
        warm = make_feed(name, panel, results=2 * sizes.bundle_size, patients=sizes.patients,
                         bundle_size=sizes.bundle_size, seed=seed + 100 + offset, prefix=f"warm-{name}")
        out.append((feed, warm))
    return out


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def _versions() -> str:
    from importlib.metadata import version

    names = ("fhir.resources", "pydantic", "fastapi", "uvicorn", "sqlalchemy", "httpx")
    libs = ", ".join(f"{n} {version(n)}" for n in names)
    return f"Python {platform.python_version()}, SQLite {sqlite3.sqlite_version}; {libs}"


def _source_state() -> str:
    """Which service code was measured: the commit, and whether service/ had uncommitted edits."""
    def git(*args: str) -> str:
        try:
            done = subprocess.run(["git", *args], cwd=REPO_ROOT, capture_output=True, text=True, timeout=10)
        except (OSError, subprocess.TimeoutExpired):
            return ""
        return done.stdout.strip() if done.returncode == 0 else ""

    head = git("rev-parse", "--short", "HEAD") or "unknown"
    dirty = len([line for line in git("status", "--porcelain", "--", "service").splitlines() if line])
    return f"commit {head}" + (f" + {dirty} uncommitted file(s) under service/" if dirty else "")


def _verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def _report(figures: list[FeedFigures], stored: HttpFigures, sizes: Sizes, stored_rows: int,
            prefill_s: float, elapsed_s: float, others_cores: float) -> str:
    lines = [
        "",
        f"machine: {len(os.sched_getaffinity(0))} CPUs (nproc), {_cpu_model()}",
        f"software: {_versions()}",
        f"service code: {_source_state()}",
        f"command: python -m bench.ingest_benchmark {' '.join(sys.argv[1:])}".rstrip(),
        f"run: {sizes.results} results per feed, Bundles of {sizes.bundle_size}, {sizes.clients} HTTP clients, "
        f"{sizes.patients} feed patients; store pre-filled with {stored_rows} results over "
        f"{sizes.stored_patients} patients in {prefill_s:.0f}s",
        "",
        f"{'feed':<24}{'results':>8}{'watched':>8}{'validate/s':>12}{'in-proc/s':>11}{'HTTP/s':>9}"
        f"{'p50 ms':>9}{'p99 ms':>9}{'peak RSS MB':>13}",
    ]
    for f in figures:
        lines.append(
            f"{f.feed.name + ' (empty store)':<24}{f.feed.size:>8}{f.feed.relevant:>8}{f.validation_rate:>12,.0f}"
            f"{f.inprocess_rate:>11,.0f}{f.http.rate:>9,.0f}{f.http.p50_ms:>9.0f}{f.http.p99_ms:>9.0f}"
            f"{f.http.peak_rss_mb:>13.0f}"
        )
    base = figures[0]
    label = f"{base.feed.name} @{stored_rows:,}"
    lines.append(
        f"{label:<24}{base.feed.size:>8}{base.feed.relevant:>8}{'':>12}{'':>11}{stored.rate:>9,.0f}"
        f"{stored.p50_ms:>9.0f}{stored.p99_ms:>9.0f}{stored.peak_rss_mb:>13.0f}"
    )
    panel = figures[1]
    r_all = base.http.rate / base.validation_rate
    r_panel = panel.http.rate / panel.validation_rate
    r_stored = stored.rate / base.http.rate
    peak = max([f.http.peak_rss_mb for f in figures] + [stored.peak_rss_mb])
    lines += [
        "",
        f"{'target':<58}{'measured':>10}{'target':>10}  verdict",
        f"{'HTTP / validation-only, all-relevant':<58}{r_all:>9.2f}x{TARGET_ALL_RELEVANT_VS_VALIDATION:>9.2f}x  "
        f"{_verdict(r_all >= TARGET_ALL_RELEVANT_VS_VALIDATION)}",
        f"{'HTTP / validation-only (all 8 validated), panel':<58}{r_panel:>9.2f}x{TARGET_PANEL_VS_VALIDATION:>9.2f}x  "
        f"{_verdict(r_panel >= TARGET_PANEL_VS_VALIDATION)}",
        f"{f'HTTP @{stored_rows:,} stored / empty store, all-relevant':<58}{r_stored:>9.2f}x"
        f"{TARGET_STORED_VS_EMPTY:>9.2f}x  {_verdict(r_stored >= TARGET_STORED_VS_EMPTY)}",
        f"{'server peak RSS (VmHWM), worst of all HTTP runs':<58}{peak:>7.0f} MB{TARGET_PEAK_RSS_MB:>7.0f} MB  "
        f"{_verdict(peak <= TARGET_PEAK_RSS_MB)}",
        "",
        f"rules on / rules off, in-process: all-relevant {base.inprocess_rate / base.inprocess_no_rules_rate:.2f}x "
        f"({base.inprocess_no_rules_rate:,.0f}/s off), panel {panel.inprocess_rate / panel.inprocess_no_rules_rate:.2f}x "
        f"({panel.inprocess_no_rules_rate:,.0f}/s off)",
        f"in-process / validation-only: all-relevant {base.inprocess_rate / base.validation_rate:.2f}x, "
        f"panel {panel.inprocess_rate / panel.validation_rate:.2f}x; "
        f"HTTP / in-process: all-relevant {base.http.rate / base.inprocess_rate:.2f}x, "
        f"panel {panel.http.rate / panel.inprocess_rate:.2f}x",
        "",
        "CPU during the HTTP runs (cores busy = CPU seconds / wall seconds):",
        *(_cpu_line(name, h) for name, h in
          [(f.feed.name, f.http) for f in figures] + [(f"{base.feed.name} @{stored_rows:,}", stored)]),
        f"other processes over the whole run: {others_cores:.2f} cores on average"
        + ("  (WARNING: the machine was shared; figures are disturbed)" if others_cores > 0.1 else ""),
        f"total time {elapsed_s:.0f}s",
    ]
    return "\n".join(lines)


def _cpu_line(name: str, h: HttpFigures) -> str:
    return (f"  {name:<24} wall {h.seconds:6.1f}s  server {h.server_cpu_s:6.1f}s CPU "
            f"({h.server_cpu_s / h.seconds:.2f} cores)  client {h.client_cpu_s:6.1f}s CPU "
            f"({h.client_cpu_s / h.seconds:.2f} cores)  other processes {h.other_cores:.2f} cores")


def _progress(message: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {message}", file=sys.stderr, flush=True)


def _own_cpu_seconds() -> float:
    """CPU of this process and of its finished children (the servers, once stopped)."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def run(sizes: Sizes, *, seed: int) -> int:
    started, own0, busy0 = time.perf_counter(), _own_cpu_seconds(), machine_busy_seconds()
    _progress("generating feeds")
    feeds = _feeds(sizes, seed)
    figures: list[FeedFigures] = []
    with tempfile.TemporaryDirectory(prefix="lytestream-bench-") as tmp:
        work = Path(tmp)
        for feed, warm in feeds:
            _progress(f"{feed.name}: validation only ({feed.size} results)")
            v = validation_rate(feed, warm)
            _progress(f"{feed.name}: in-process ingest")
            ip = inprocess_rate(feed, warm, work)
            _progress(f"{feed.name}: in-process ingest, rules off")
            ip_bare = inprocess_rate(feed, warm, work, rules=False)
            _progress(f"{feed.name}: HTTP ingest, {len(feed.bundles)} Bundles, {sizes.clients} clients")
            http = http_figures(feed, warm, work / f"http-{feed.name}", sizes)
            figures.append(FeedFigures(feed, v, ip, http, ip_bare))
        feed, warm = feeds[0]
        stored_dir = work / "http-stored"
        _progress(f"pre-filling the store with {sizes.stored} results")
        t0 = time.perf_counter()
        stored_rows = prefill_store(f"sqlite:///{(stored_dir / 'lytestream.db').as_posix()}", stored=sizes.stored,
                                    patients=sizes.stored_patients, seed=seed + 7)
        prefill_s = time.perf_counter() - t0
        _progress(f"{feed.name}: HTTP ingest with {stored_rows} stored")
        stored = http_figures(feed, warm, stored_dir, sizes, already_stored=stored_rows)
        elapsed = time.perf_counter() - started
        others = max(0.0, machine_busy_seconds() - busy0 - (_own_cpu_seconds() - own0)) / elapsed
        print(_report(figures, stored, sizes, stored_rows, prefill_s, elapsed, others), flush=True)
    return 0


def run_profile(sizes: Sizes, *, seed: int) -> int:
    """Only the profile of the in-process path, all-relevant feed (kept apart from the timed runs)."""
    feed, warm = _feeds(sizes, seed)[0]
    with tempfile.TemporaryDirectory(prefix="lytestream-profile-") as tmp:
        _progress(f"profiling in-process ingest of {feed.size} results")
        print(f"command: python -m bench.ingest_benchmark {' '.join(sys.argv[1:])}".rstrip())
        print(f"service code: {_source_state()}\n")
        print(profile_inprocess(feed, warm, Path(tmp)), flush=True)
    return 0


def _sizes(args: argparse.Namespace) -> Sizes:
    quick = bool(args.quick)
    return Sizes(
        results=args.results or (4_000 if quick else 30_000),
        stored=args.stored if args.stored is not None else (50_000 if quick else 1_000_000),
        patients=args.patients,
        stored_patients=args.stored_patients,
        bundle_size=args.bundle_size,
        clients=args.clients,
    )


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m bench.ingest_benchmark", description=__doc__.split("\n")[0])
    p.add_argument("--quick", action="store_true", help="small run (about a minute): fewer results, 50,000 stored")
    p.add_argument("--stored", type=int, default=None, help="results pre-filled for the last run (default 1,000,000)")
    p.add_argument("--results", type=int, default=None, help="results per feed (default 30,000; quick 4,000)")
    p.add_argument("--patients", type=int, default=3_000, help="patients in the feeds")
    p.add_argument("--stored-patients", type=int, default=20_000, help="patients in the pre-filled history")
    p.add_argument("--bundle-size", type=int, default=100, help="results per transaction Bundle")
    p.add_argument("--clients", type=int, default=8, help="concurrent HTTP connections")
    p.add_argument("--seed", type=int, default=20260302, help="random seed of the generated data")
    p.add_argument("--profile", action="store_true",
                   help="instead of the benchmark, profile the in-process path (all-relevant feed)")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    sizes = _sizes(args)
    if sizes.patients > sizes.stored_patients:
        raise SystemExit("--patients must not exceed --stored-patients: feed patients are among the stored ones")
    if min(sizes.results, sizes.bundle_size, sizes.clients) < 1 or sizes.stored < 0:
        raise SystemExit("sizes must be positive")
    try:
        if args.profile:
            return run_profile(sizes, seed=args.seed)
        return run(sizes, seed=args.seed)
    except CheckFailed as exc:
        print(f"CHECK FAILED: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    raise SystemExit(main())
