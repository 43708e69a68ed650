"""Real service processes for the drills: start `python -m service serve` and wait until it is ready."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time

import httpx

__all__ = ["clean_env", "free_port", "start_server"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def clean_env(**settings: str) -> dict[str, str]:
    """This environment without LYTESTREAM_* variables, plus the given ones."""
    base = {k: v for k, v in os.environ.items() if not k.startswith("LYTESTREAM_")}
    return {**base, **settings}


def start_server(port: int, *args: str, env: dict[str, str] | None = None) -> subprocess.Popen[bytes]:
    """`lytestream serve` on 127.0.0.1:port, returned once /readyz answers (30 s at most)."""
    proc = subprocess.Popen([sys.executable, "-m", "service", "serve", "--port", str(port), *args],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env or clean_env())
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1).status_code == 200:
                return proc
        except httpx.TransportError:
            time.sleep(0.1)
    proc.kill()
    raise AssertionError("server did not become ready in 30 s")
