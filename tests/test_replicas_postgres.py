"""Two service processes on one PostgreSQL: every outbox row is delivered once, by one of them."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

import subprocess
import sys
import time
from collections import Counter
from typing import Any

import httpx
import orjson
import pytest

from tests.factories import HEADERS, bundle, dumps, observation
from tests.servers import clean_env, free_port, start_server
from tests.test_delivery_loopback import Receiver, event_numbers

pytestmark = [pytest.mark.slow, pytest.mark.postgres]


def env(database_url: str) -> dict[str, str]:
    return clean_env(LYTESTREAM_DATABASE_URL=database_url, LYTESTREAM_ALLOW_HTTP_ENDPOINTS="true",
                     LYTESTREAM_DELIVER_SECONDS="0.2", LYTESTREAM_RECHECK_SECONDS="3600")


def cli(database_url: str, *args: str) -> str:
    out = subprocess.run([sys.executable, "-m", "service", *args], capture_output=True, text=True, check=True,
                         env=env(database_url))
    return out.stdout.strip()


def test_two_replicas_deliver_each_event_once(postgres_url: str) -> None:
    database_url = postgres_url
    cli(database_url, "db", "upgrade")
    token = cli(database_url, "token", "create", "--client", "drill", "--scope", "system/*.cruds")
    auth = {**HEADERS, "Authorization": f"Bearer {token}"}
    receiver = Receiver()
    receiver.up()
    ports = [free_port(), free_port()]
    procs = [start_server(p, env=env(database_url)) for p in ports]
    try:
        sub: dict[str, Any] = {
            "resourceType": "Subscription", "status": "requested", "reason": "pager",
            "criteria": "https://lytestream.example/fhir/SubscriptionTopic/flag-changed",
            "channel": {"type": "rest-hook", "endpoint": f"http://127.0.0.1:{receiver.port}/hook",
                        "payload": "application/fhir+json"}}
        assert httpx.post(f"http://127.0.0.1:{ports[0]}/fhir/Subscription", content=orjson.dumps(sub),
                          headers=auth).status_code == 201
        # Results dated just before now, so each one raises a Flag; both replicas take writes.
        now = time.time()
        for i in range(30):
            when = time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime(now - 3600 + i))
            body = bundle("batch", observation(f"r{i}", value=115, patient=f"Patient/p{i}", effective=when))
            r = httpx.post(f"http://127.0.0.1:{ports[i % 2]}/fhir", content=dumps(body), headers=auth, timeout=30)
            assert r.status_code == 200
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and len(event_numbers(receiver.bodies)) < 30:
            time.sleep(0.2)
        time.sleep(1.0)  # a duplicate, if any, would arrive now
    finally:
        for p in procs:
            p.terminate()
            p.wait(timeout=10)
        receiver.down()
    counts = Counter(event_numbers(receiver.bodies))
    assert sorted(counts) == list(range(1, 31))
    assert set(counts.values()) == {1}
