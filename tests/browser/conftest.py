"""A real browser on the real board: `lytestream demo --serve` in its own process, headless Chromium.

Chromium runs with every host name but 127.0.0.1 unresolvable, so a page that needed the internet (a
CDN, a web font) would fail here as it would on a closed hospital network. Screenshots go to
tests/artefacts/ (or LYTESTREAM_ARTEFACTS).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest

from tests.servers import clean_env, free_port

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"
ARTEFACTS = Path(os.environ.get("LYTESTREAM_ARTEFACTS", Path(__file__).resolve().parents[1] / "artefacts"))


def _missing() -> str | None:
    for path, package in ((CHROMIUM, "chromium"), (CHROMEDRIVER, "chromium-driver")):
        if not Path(path).exists():
            return f"{path} is missing: install Debian's {package} package (.ci/run does)"
    try:
        import selenium  # noqa: F401
    except ImportError:
        return "selenium is not installed (pip install -e '.[test]')"
    return None


@dataclass
class DemoServer:
    url: str
    token: str
    data_dir: Path
    process: subprocess.Popen[bytes]


@pytest.fixture(scope="session")
def demo_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[DemoServer]:
    reason = _missing()
    if reason:
        pytest.skip(reason)
    data_dir = tmp_path_factory.mktemp("board-demo")
    port = free_port()
    out = data_dir / "stdout.txt"
    with out.open("wb") as stdout:
        proc = subprocess.Popen([sys.executable, "-m", "service", "demo", "--serve", "--port", str(port),
                                 "--data-dir", str(data_dir)], stdout=stdout, stderr=subprocess.DEVNULL,
                                env=clean_env(LYTESTREAM_BOARD_REFRESH_SECONDS="1"))
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"{url}/board/login", timeout=1).status_code == 200:
                break
        except httpx.TransportError:
            pass
        if proc.poll() is not None:
            raise AssertionError(f"demo --serve exited with {proc.returncode}")
        time.sleep(0.3)
    else:
        proc.kill()
        raise AssertionError("demo --serve did not answer in 90 s")
    token = out.read_text().strip().splitlines()[0]
    try:
        yield DemoServer(url=url, token=token, data_dir=data_dir, process=proc)
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()


@pytest.fixture(scope="session")
def browser(demo_server: DemoServer) -> Iterator[object]:
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                "--disable-quic", "--window-size=1280,800",
                # The network cut off: nothing but this machine resolves.
                "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1"):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(30)
    ARTEFACTS.mkdir(parents=True, exist_ok=True)
    try:
        yield driver
    finally:
        driver.quit()
