"""Reliability drills against a real server process: a 2xx survives a crash, a restart serves it."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from tests.factories import HEADERS, bundle, dumps, observation

pytestmark = pytest.mark.slow


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start(data_dir: Path, port: int) -> subprocess.Popen[bytes]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "service", "serve", "--port", str(port), "--data-dir", str(data_dir)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        env={k: v for k, v in os.environ.items() if not k.startswith("LYTESTREAM_")},
    )
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1).status_code == 200:
                return proc
        except httpx.TransportError:
            time.sleep(0.1)
    proc.kill()
    raise AssertionError("server did not become ready in 30 s")


def token(data_dir: Path) -> str:
    """A token from `lytestream token create`, which prints it alone on standard output."""
    out = subprocess.run(
        [sys.executable, "-m", "service", "token", "create", "--client", "drill", "--scope", "system/*.cruds",
         "--data-dir", str(data_dir)], capture_output=True, check=True, text=True,
        env={k: v for k, v in os.environ.items() if not k.startswith("LYTESTREAM_")},
    )
    assert out.stdout.count("\n") == 1
    return out.stdout.strip()


def test_acknowledged_results_survive_a_kill_and_restart(tmp_path: Path) -> None:
    port = free_port()
    auth = {"Authorization": f"Bearer {token(tmp_path)}"}
    proc = start(tmp_path, port)
    try:
        body = bundle("transaction", *[observation(f"R{i}", value=120 + i) for i in range(50)])
        r = httpx.post(f"http://127.0.0.1:{port}/fhir", content=dumps(body), headers={**HEADERS, **auth}, timeout=30)
        assert r.status_code == 200
    finally:
        proc.send_signal(signal.SIGKILL)  # no shutdown hooks, no checkpoint: as a crash would
        proc.wait(timeout=10)
    proc = start(tmp_path, port)
    try:
        found = httpx.get(f"http://127.0.0.1:{port}/fhir/Observation?_count=100", headers=auth, timeout=10).json()
        assert found["total"] == 50
    finally:
        proc.terminate()
        proc.wait(timeout=10)
