"""The HTTP side of the benchmark: a lytestream server subprocess on loopback and concurrent clients.

The server is the service's own app factory under uvicorn, configured only through its
``LYTESTREAM_*`` environment, so what is measured is what a deployment runs.
"""

from __future__ import annotations

import importlib.util
import os
import queue
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx
import orjson

__all__ = ["LoadResult", "Server", "machine_busy_seconds", "mint_token", "percentile", "run_load", "server"]

HOST = "127.0.0.1"
_HEADERS = {"content-type": "application/fhir+json", "prefer": "return=minimal"}
_START_TIMEOUT_S = 90.0
_REQUEST_TIMEOUT_S = 300.0


@dataclass(frozen=True)
class Server:
    pid: int
    base_url: str
    log: Path
    token: str | None  # bearer token the feed presents, when the service checks access

    def headers(self) -> dict[str, str]:
        return {**_HEADERS, "authorization": f"Bearer {self.token}"} if self.token else dict(_HEADERS)

    def processes(self) -> list[int]:
        """The server's supervisor and its worker processes."""
        pids = [self.pid]
        for task in Path(f"/proc/{self.pid}/task").iterdir():
            children = (task / "children").read_text().split()
            pids += [int(c) for c in children]
        return pids

    def peak_rss_mb(self) -> float:
        """The largest VmHWM of any server process (supervisor or worker): peak resident memory, in MiB."""
        return max(_vmhwm_mb(pid) for pid in self.processes())

    def cpu_seconds(self) -> float:
        """CPU time of the supervisor and every worker."""
        return sum(_cpu_seconds(pid) for pid in self.processes())


def _vmhwm_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024.0
    raise RuntimeError("VmHWM not reported by /proc for the server process")


def _cpu_seconds(pid: int) -> float:
    """User + system CPU time one process has used so far (all its threads)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    utime, stime = int(fields[11]), int(fields[12])  # fields 14 and 15 of proc(5), after pid and comm
    return (utime + stime) / os.sysconf("SC_CLK_TCK")


@dataclass(frozen=True)
class LoadResult:
    results: int  # results sent
    requests: int
    seconds: float
    latencies_ms: list[float]
    created: int  # entries the server answered 201 Created
    acknowledged: int  # entries answered 200 (dropped at triage, or unchanged)
    client_cpu_s: float  # CPU the load generator itself used: it shares the machine with the server
    machine_cpu_s: float  # CPU the whole machine used meanwhile

    @property
    def rate(self) -> float:
        return self.results / self.seconds


def machine_busy_seconds() -> float:
    """CPU seconds all processes of the machine have used since boot (/proc/stat, all CPUs).

    Compared with what the server and the load generator used, it shows whether something else
    on the machine competed with the benchmark.
    """
    fields = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
    values = [int(v) for v in fields[:8]]  # user nice system idle iowait irq softirq steal
    busy = sum(values) - values[3] - values[4]
    return busy / os.sysconf("SC_CLK_TCK")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((HOST, 0))
        return int(s.getsockname()[1])


def _log_tail(path: Path, lines: int = 30) -> str:
    try:
        return "\n".join(path.read_text(errors="replace").splitlines()[-lines:])
    except OSError:
        return "(no server log)"


def _wait_ready(proc: subprocess.Popen[bytes], base_url: str, log: Path) -> None:
    deadline = time.monotonic() + _START_TIMEOUT_S
    with httpx.Client(timeout=2.0) as client:
        while time.monotonic() < deadline:
            if proc.poll() is not None:
                raise RuntimeError(f"server exited with {proc.returncode}:\n{_log_tail(log)}")
            try:
                if client.get(f"{base_url}/healthz").status_code == 200:
                    return
            except httpx.TransportError:
                pass
            time.sleep(0.1)
    raise RuntimeError(f"server not ready after {_START_TIMEOUT_S:.0f}s:\n{_log_tail(log)}")


def mint_token(data_dir: Path, *, cwd: Path) -> str | None:
    """A token for the feed from the service's own ``token create`` command; None if it has no access control.

    The feed holds the narrowest scope a lab interface needs, so the scope check is measured as deployed.
    """
    if importlib.util.find_spec("service.auth.cli") is None:
        return None
    cmd = [sys.executable, "-c", "from service.cli import app; app()", "token", "create",
           "--client", "ingest-benchmark", "--scope", "system/Observation.cu", "--data-dir", str(data_dir)]
    done = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "LYTESTREAM_DATA_DIR": str(data_dir)})
    if done.returncode != 0 or not done.stdout.strip():
        raise RuntimeError(f"token create failed ({done.returncode}): {done.stderr[-1000:]}")
    return done.stdout.strip()


WORKERS = int(os.environ.get("BENCH_WORKERS", os.cpu_count() or 1))  # `serve --workers`: one per core


@contextmanager
def server(data_dir: Path, *, cwd: Path, workers: int = WORKERS) -> Iterator[Server]:
    """A lytestream server on a free loopback port, storing in ``data_dir`` (SQLite); stopped on exit."""
    token = mint_token(data_dir, cwd=cwd)
    port = _free_port()
    base_url = f"http://{HOST}:{port}"
    log = data_dir.parent / f"{data_dir.name}-server.log"
    env = {**os.environ, "LYTESTREAM_DATA_DIR": str(data_dir), "LYTESTREAM_BASE_URL": f"{base_url}/fhir"}
    cmd = [sys.executable, "-m", "service", "serve", "--host", HOST, "--port", str(port),
           "--data-dir", str(data_dir), "--workers", str(workers)]
    with log.open("wb") as out:
        proc = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=out, stderr=subprocess.STDOUT)
    try:
        _wait_ready(proc, base_url, log)
        yield Server(pid=proc.pid, base_url=base_url, log=log, token=token)
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=30)


def percentile(values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile (q in 0..100) of a non-empty sample."""
    ordered = sorted(values)
    rank = max(1, min(len(ordered), round(q / 100.0 * len(ordered) + 0.5)))
    return ordered[rank - 1]


def _client(srv: Server, work: queue.SimpleQueue[tuple[int, bytes]], start: threading.Barrier,
            latencies: list[float], answers: dict[int, tuple[int, bytes]], errors: list[BaseException]) -> None:
    """One feed connection: takes the next Bundle until none are left (keep-alive, like an interface)."""
    with httpx.Client(base_url=srv.base_url, timeout=_REQUEST_TIMEOUT_S, headers=srv.headers()) as client:
        start.wait()
        while True:
            try:
                index, body = work.get_nowait()
            except queue.Empty:
                return
            t0 = time.perf_counter()
            try:
                response = client.post("/fhir", content=body)
            except httpx.HTTPError as exc:
                errors.append(exc)  # reported after the run; this connection stops
                return
            latencies.append((time.perf_counter() - t0) * 1000.0)  # list.append is atomic under the GIL
            answers[index] = (response.status_code, response.content)


def _tally(answers: dict[int, tuple[int, bytes]], bundles: Sequence[bytes]) -> tuple[int, int]:
    """(created, acknowledged) entries; raises if any Bundle failed or was answered short."""
    created = acknowledged = 0
    for index, body in enumerate(bundles):
        if index not in answers:
            raise RuntimeError(f"Bundle {index} got no answer")
        status, content = answers[index]
        if status != 200:
            raise RuntimeError(f"Bundle {index} answered {status}: {content[:500]!r}")
        entries = orjson.loads(content).get("entry") or []
        sent = len(orjson.loads(body)["entry"])
        if len(entries) != sent:
            raise RuntimeError(f"Bundle {index}: {sent} entries sent, {len(entries)} answered")
        for e in entries:
            code = str(e.get("response", {}).get("status", ""))
            if code.startswith("201"):
                created += 1
            elif code.startswith("200"):
                acknowledged += 1
            else:
                raise RuntimeError(f"Bundle {index}: an entry answered {code!r}")
    return created, acknowledged


def send_sequentially(srv: Server, bundles: Sequence[bytes]) -> None:
    """Warm-up traffic: imports, model building and connection setup happen before timing starts."""
    with httpx.Client(base_url=srv.base_url, timeout=_REQUEST_TIMEOUT_S, headers=srv.headers()) as client:
        for body in bundles:
            response = client.post("/fhir", content=body)
            if response.status_code != 200:
                raise RuntimeError(f"warm-up Bundle answered {response.status_code}: {response.text[:500]}")


def run_load(srv: Server, bundles: Sequence[bytes], *, results: int, clients: int) -> LoadResult:
    """Send every Bundle over ``clients`` concurrent connections; time from first send to last answer."""
    work: queue.SimpleQueue[tuple[int, bytes]] = queue.SimpleQueue()
    for item in enumerate(bundles):
        work.put(item)
    latencies: list[float] = []
    answers: dict[int, tuple[int, bytes]] = {}
    errors: list[BaseException] = []
    start = threading.Barrier(clients + 1)
    threads = [threading.Thread(target=_client, args=(srv, work, start, latencies, answers, errors),
                                daemon=True)
               for _ in range(clients)]
    for t in threads:
        t.start()
    start.wait()
    t0, cpu0, busy0 = time.perf_counter(), time.process_time(), machine_busy_seconds()
    for t in threads:
        t.join(timeout=_REQUEST_TIMEOUT_S * (len(bundles) + 1))
    seconds, client_cpu = time.perf_counter() - t0, time.process_time() - cpu0
    machine_cpu = machine_busy_seconds() - busy0
    if any(t.is_alive() for t in threads):
        raise RuntimeError("a client thread did not finish")
    if errors:
        raise RuntimeError(f"{len(errors)} request(s) failed on the wire; first: {errors[0]!r}")
    created, acknowledged = _tally(answers, bundles)
    return LoadResult(results=results, requests=len(bundles), seconds=seconds, latencies_ms=latencies,
                      created=created, acknowledged=acknowledged, client_cpu_s=client_cpu,
                      machine_cpu_s=machine_cpu)
