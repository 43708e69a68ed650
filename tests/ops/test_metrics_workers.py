"""With several workers, any worker's scrape counts every worker's requests (prometheus_client
multiprocess mode under `serve --workers N`), and a restart starts the counts afresh."""

from __future__ import annotations

from pathlib import Path

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.servers import clean_env, free_port, start_server

pytestmark = pytest.mark.slow


def healthz_count(port: int) -> float:
    text = httpx.get(f"http://127.0.0.1:{port}/metrics", timeout=10).text
    return sum(s.value for family in text_string_to_metric_families(text) for s in family.samples
               if s.name == "lytestream_http_request_duration_seconds_count" and s.labels.get("route") == "/healthz")


def run_and_scrape(tmp_path: Path, requests: int) -> list[float]:
    port = free_port()
    env = clean_env(LYTESTREAM_DATA_DIR=str(tmp_path), LYTESTREAM_METRICS="open")
    proc = start_server(port, "--workers", "2", env=env)
    try:
        with httpx.Client() as client:  # a new connection each time would also do; the count is the point
            for _ in range(requests):
                assert client.get(f"http://127.0.0.1:{port}/healthz", headers={"Connection": "close"}).status_code \
                    == 200
        return [healthz_count(port) for _ in range(4)]
    finally:
        proc.terminate()
        proc.wait(timeout=30)


def test_every_scrape_of_two_workers_counts_all_requests(tmp_path: Path) -> None:
    assert run_and_scrape(tmp_path, 8) == [8.0] * 4


def test_a_restart_does_not_carry_the_last_runs_counts(tmp_path: Path) -> None:
    run_and_scrape(tmp_path, 3)
    assert run_and_scrape(tmp_path, 2) == [2.0] * 4
