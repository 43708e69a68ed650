"""Memory drill: peak RSS of one `lytestream serve` worker under six concurrent near-limit requests.

    python -m bench.memory_drill [--clients 6] [--shape notes|dense|all] [--dense-values N]

For each request shape it starts a fresh server (one worker, so every request lands in the same
process; settings from the environment as a deployment has them), warms it up with one small
transaction, then sends the same near-limit transaction Bundle from ``--clients`` concurrent
connections and prints the worker's peak resident memory (VmHWM), before and after, with every
answer's status. Nothing here is a test: it prints figures for the README.

Shapes (both invented results, valid FHIR R4):

* ``notes``: results carrying long comments (``note.text``), the Bundle filled to just under
  ``LYTESTREAM_MAX_BODY_BYTES``: memory that grows with bytes;
* ``dense``: results carrying many short extra identifiers, the Bundle filled to just under
  ``LYTESTREAM_MAX_JSON_VALUES`` values: memory that grows with the number of elements (each
  identifier becomes a model object when validated; the costliest shape per byte we found).
"""

from __future__ import annotations

import argparse
import platform
import random
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import orjson

from bench.feeds import ALL_RELEVANT, FEED_START, draws, transaction_bundle
from bench.http_load import Server, server
from service.config import Settings

__all__ = ["main"]

REPO_ROOT = Path(__file__).resolve().parent.parent
# The budget the README states for one worker at the default settings (idle worker about 110 MB,
# plus up to ``max_concurrent_bodies`` near-limit requests in progress).
BUDGET_MB = 300.0
_BUDGET_SETTINGS = ("max_body_bytes", "max_json_values", "max_bundle_entries", "max_concurrent_bodies",
                    "max_string_chars")
_VALUES_PER_IDENTIFIER = 2  # the object and its value


def _results(count: int, seed: int) -> list[dict[str, Any]]:
    rng = random.Random(seed)
    return list(draws(ALL_RELEVANT, count=count // len(ALL_RELEVANT), patients=50, start=FEED_START, days=2.0,
                      prefix=f"drill{seed}", rng=rng))


def _bundle(resources: list[dict[str, Any]], seed: int) -> bytes:
    return orjson.dumps(transaction_bundle(resources, random.Random(seed)))


def notes_bundle(settings: Settings, seed: int) -> bytes:
    """As many results as a Bundle may hold, their comments filling it to 99% of the body limit."""
    resources = _results(settings.max_bundle_entries, seed)
    bare = len(_bundle(resources, seed))
    room = int(settings.max_body_bytes * 0.99) - bare
    per = min(getattr(settings, "max_string_chars", 2**20), max(0, room // len(resources) - len(b',"note":[{"text":""}]')))
    for r in resources:
        r["note"] = [{"text": "comment " * (per // 8)}]
    return _bundle(resources, seed)


def dense_bundle(settings: Settings, seed: int, values: int | None = None) -> bytes:
    """As many results as a Bundle may hold, short extra identifiers bringing it to 99% of the value limit.

    ``values`` sets another total (to run the drill on code from before the value limit).
    """
    resources = _results(settings.max_bundle_entries, seed)
    bare = orjson.loads(_bundle(resources, seed))
    room = (values or int(getattr(settings, "max_json_values", 100_000) * 0.99)) - _values(bare)
    per = max(0, room // len(resources) // _VALUES_PER_IDENTIFIER)
    for r in resources:
        r["identifier"] += [{"value": f"{j}"} for j in range(per)]
    return _bundle(resources, seed)


def _values(node: Any) -> int:
    if isinstance(node, dict):
        return 1 + sum(_values(v) for v in node.values())
    if isinstance(node, list):
        return 1 + sum(_values(v) for v in node)
    return 1


SHAPES: dict[str, Callable[..., bytes]] = {"notes": notes_bundle, "dense": dense_bundle}


def _worker_peak_mb(srv: Server) -> float:
    """VmHWM of the worker (the server process itself with one worker and no supervisor)."""
    return srv.peak_rss_mb()


def _send_all(srv: Server, bodies: list[bytes]) -> tuple[list[int], float]:
    statuses: list[int] = [0] * len(bodies)
    start = threading.Barrier(len(bodies))

    def one(i: int) -> None:
        with httpx.Client(base_url=srv.base_url, headers=srv.headers(), timeout=600) as client:
            start.wait()
            statuses[i] = client.post("/fhir", content=bodies[i]).status_code

    threads = [threading.Thread(target=one, args=(i,)) for i in range(len(bodies))]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return statuses, time.perf_counter() - t0


def drill(shape: str, clients: int, settings: Settings, dense_values: int | None = None) -> dict[str, Any]:
    extra = {"values": dense_values} if shape == "dense" else {}
    bodies = [SHAPES[shape](settings, seed, **extra) for seed in range(1, clients + 1)]  # distinct results each
    warm = _bundle(_results(10, 0), 0)
    with tempfile.TemporaryDirectory(prefix="lytestream-drill-") as tmp:
        data = Path(tmp) / "data"
        data.mkdir()
        with server(data, cwd=REPO_ROOT, workers=1) as srv:
            with httpx.Client(base_url=srv.base_url, headers=srv.headers(), timeout=120) as client:
                if (code := client.post("/fhir", content=warm).status_code) != 200:
                    raise RuntimeError(f"warm-up answered {code}")
            baseline = _worker_peak_mb(srv)
            statuses, seconds = _send_all(srv, bodies)
            peak = _worker_peak_mb(srv)
    return {"shape": shape, "body_mb": len(bodies[0]) / 2**20, "values": _values(orjson.loads(bodies[0])),
            "baseline_mb": baseline, "peak_mb": peak, "statuses": statuses, "seconds": seconds}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--clients", type=int, default=6, help="concurrent near-limit requests (default 6)")
    parser.add_argument("--shape", choices=[*SHAPES, "all"], default="all")
    parser.add_argument("--dense-values", type=int, default=None,
                        help="JSON values of each dense Bundle (default: 99%% of LYTESTREAM_MAX_JSON_VALUES)")
    args = parser.parse_args(argv)
    settings = Settings()  # what the server processes will read from the same environment
    print(f"# memory drill: {args.clients} concurrent near-limit transactions, one worker; "
          f"{platform.python_version()}, {platform.machine()}")
    print("# settings: " + " ".join(f"{name}={getattr(settings, name, '(none)')}" for name in _BUDGET_SETTINGS))
    print("shape   body MiB   values   baseline MB   peak MB   statuses                 seconds")
    peaks = []
    for shape in SHAPES if args.shape == "all" else [args.shape]:
        r = drill(shape, args.clients, settings, args.dense_values)
        peaks.append(r["peak_mb"])
        print(f"{r['shape']:<7} {r['body_mb']:>8.2f} {r['values']:>8} {r['baseline_mb']:>13.0f} "
              f"{r['peak_mb']:>9.0f}   {','.join(map(str, r['statuses'])):<24} {r['seconds']:>7.1f}", flush=True)
    fields = Settings.model_fields
    if all(name in fields and getattr(settings, name) == fields[name].default for name in _BUDGET_SETTINGS):
        verdict = "met" if max(peaks) <= BUDGET_MB else "MISSED"
        print(f"peak RSS {max(peaks):.0f} MB against the budget of {BUDGET_MB:.0f} MB per worker: {verdict}")
    else:
        print("limits differ from the defaults: the stated budget does not apply")
    return 0


if __name__ == "__main__":
    sys.exit(main())
