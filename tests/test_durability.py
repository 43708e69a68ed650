"""Reliability drills against a real server process: a 2xx survives a crash, a restart serves it."""

from __future__ import annotations

import signal
import subprocess
import sys
from pathlib import Path

import httpx
import pytest

from tests.factories import HEADERS, bundle, dumps, observation
from tests.servers import clean_env, free_port, start_server

pytestmark = pytest.mark.slow


def token(data_dir: Path) -> str:
    """A token from `lytestream token create`, which prints it alone on standard output."""
    out = subprocess.run(
        [sys.executable, "-m", "service", "token", "create", "--client", "drill", "--scope", "system/*.cruds",
         "--data-dir", str(data_dir)], capture_output=True, check=True, text=True,
        env=clean_env(),
    )
    assert out.stdout.count("\n") == 1
    return out.stdout.strip()


def test_acknowledged_results_survive_a_kill_and_restart(tmp_path: Path) -> None:
    port = free_port()
    auth = {"Authorization": f"Bearer {token(tmp_path)}"}
    proc = start_server(port, "--data-dir", str(tmp_path))
    try:
        body = bundle("transaction", *[observation(f"R{i}", value=120 + i) for i in range(50)])
        r = httpx.post(f"http://127.0.0.1:{port}/fhir", content=dumps(body), headers={**HEADERS, **auth}, timeout=30)
        assert r.status_code == 200
    finally:
        proc.send_signal(signal.SIGKILL)  # no shutdown hooks, no checkpoint: as a crash would
        proc.wait(timeout=10)
    proc = start_server(port, "--data-dir", str(tmp_path))
    try:
        found = httpx.get(f"http://127.0.0.1:{port}/fhir/Observation?_count=100", headers=auth, timeout=10).json()
        assert found["total"] == 50
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_two_workers_on_sqlite_store_every_result_once(tmp_path: Path) -> None:
    from concurrent.futures import ThreadPoolExecutor

    port = free_port()
    auth = {**HEADERS, "Authorization": f"Bearer {token(tmp_path)}"}
    proc = start_server(port, "--data-dir", str(tmp_path), "--workers", "2")
    try:
        def send(n: int) -> int:
            body = bundle("transaction", *[observation(f"w{n}-{i}", value=130, patient=f"Patient/p{n % 5}")
                                           for i in range(20)])
            with httpx.Client(timeout=30) as c:
                return c.post(f"http://127.0.0.1:{port}/fhir", content=dumps(body), headers=auth).status_code

        with ThreadPoolExecutor(max_workers=8) as pool:
            statuses = list(pool.map(send, range(40)))
        found = httpx.get(f"http://127.0.0.1:{port}/fhir/Observation?_count=1", headers=auth, timeout=10).json()
    finally:
        proc.terminate()
        proc.wait(timeout=10)
    assert statuses == [200] * 40
    assert found["total"] == 800
