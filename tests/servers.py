"""Real service processes for the drills: start `python -m service serve` and wait until it is ready."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx

__all__ = ["clean_env", "free_port", "mint_token", "start_server"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def clean_env(**settings: str) -> dict[str, str]:
    """This environment without LYTESTREAM_* variables, plus the given ones."""
    base = {k: v for k, v in os.environ.items() if not k.startswith("LYTESTREAM_")}
    return {**base, **settings}


def mint_token(data_dir: Path, scope: str = "system/*.cruds") -> str:
    """A token from `lytestream token create`, which prints it alone on standard output."""
    out = subprocess.run([sys.executable, "-m", "service", "token", "create", "--client", "drill", "--scope", scope,
                          "--data-dir", str(data_dir)], capture_output=True, check=True, text=True, env=clean_env())
    return out.stdout.strip()


def start_server(port: int, *args: str, env: dict[str, str] | None = None,
                 log: Path | None = None) -> subprocess.Popen[bytes]:
    """`lytestream serve` on 127.0.0.1:port, returned once /readyz answers (30 s at most).

    With ``log``, the server's standard error (its log) is written there.
    """
    err = log.open("wb") if log else subprocess.DEVNULL
    proc = subprocess.Popen([sys.executable, "-m", "service", "serve", "--port", str(port), *args],
                            stdout=subprocess.DEVNULL, stderr=err, env=env or clean_env())
    if log:
        err.close()  # type: ignore[union-attr]
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1).status_code == 200:
                return proc
        except httpx.TransportError:
            time.sleep(0.1)
    proc.kill()
    raise AssertionError("server did not become ready in 30 s")
