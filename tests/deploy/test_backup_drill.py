"""A backup taken while a real server takes a feed restores to a store that is whole: every result
acknowledged before the backup began is in it, and replaying its own raw requests into an empty store
raises exactly its Flags (so the Flags it holds are those its data call for, nothing half-written)."""

# Sodium values cycle through 116-131 mmol/L: 116-120 are at or below the default critical low of
# 120 mmol/L (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), and steps of up to 15 mmol/L within
# minutes exceed the default limit of 10 mmol/L in 24 h (Verbalis JG et al., Am J Med 2013;126:S1-42),
# so the feed raises, closes and re-raises Flags of both kinds as it goes.

from __future__ import annotations

import subprocess
import sys
import threading
import time
from pathlib import Path

import httpx
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, text

from service.config import Settings
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation
from tests.servers import clean_env, free_port, mint_token, start_server
from tests.stores import flag_signatures, result_identifiers

pytestmark = pytest.mark.slow

PATIENTS = 25
PER_BUNDLE = 10
VALUES = (128, 116, 121, 131, 119, 124, 130, 117)


class Feed(threading.Thread):
    """Sends bundles one after another until stopped, keeping what each 200 acknowledged and when."""

    def __init__(self, port: int, token: str) -> None:
        super().__init__(daemon=True)
        self.url = f"http://127.0.0.1:{port}/fhir"
        self.headers = {**HEADERS, "Authorization": f"Bearer {token}"}
        self.start_at = time.time() - 40 * 60  # every result arrives within the hour: no late notes
        self.acked: list[tuple[float, str]] = []  # (monotonic time of the 200, identifier)
        self.failures: list[int] = []
        self.stop = threading.Event()
        self.bundles = 0

    def run(self) -> None:
        with httpx.Client(timeout=30) as client:
            k = 0
            while not self.stop.is_set():
                when = time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime(self.start_at + k * 5))
                idents = [f"k{k}-{i}" for i in range(PER_BUNDLE)]
                obs = [observation(ident, value=VALUES[(k + i) % len(VALUES)],
                                   patient=f"Patient/bk{(k * PER_BUNDLE + i) % PATIENTS}", effective=when)
                       for i, ident in enumerate(idents)]
                r = client.post(self.url, content=dumps(bundle("transaction", *obs)), headers=self.headers)
                if r.status_code == 200:
                    now = time.monotonic()
                    self.acked.extend((now, ident) for ident in idents)
                else:
                    self.failures.append(r.status_code)
                k += 1
                self.bundles = k


def _raw_requests(url: str) -> list[bytes]:
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            return [bytes(r[0]) for r in conn.execute(text("SELECT body FROM received_request ORDER BY id"))]
    finally:
        engine.dispose()


@pytest.mark.timeout(120)
def test_a_backup_under_load_restores_to_a_store_that_replays_to_the_same_flags(tmp_path: Path) -> None:
    live, restored, replayed = tmp_path / "live", tmp_path / "restored", tmp_path / "replayed"
    token = mint_token(live)
    port = free_port()
    proc = start_server(port, "--data-dir", str(live))
    feed = Feed(port, token)
    try:
        feed.start()
        while feed.bundles < 30:
            time.sleep(0.05)
        began = time.monotonic()
        started = time.perf_counter()
        subprocess.run([sys.executable, "-m", "service", "db", "backup", str(tmp_path / "backup.db"),
                        "--data-dir", str(live)], check=True, capture_output=True, env=clean_env())
        took = time.perf_counter() - started
        at_backup = feed.bundles
        while feed.bundles < at_backup + 15:  # the feed goes on after the backup
            time.sleep(0.05)
    finally:
        feed.stop.set()
        feed.join(timeout=30)
        proc.terminate()
        proc.wait(timeout=20)
    assert feed.failures == []

    out = subprocess.run([sys.executable, "-m", "service", "db", "restore", str(tmp_path / "backup.db"),
                          "--data-dir", str(restored)], capture_output=True, text=True, env=clean_env())
    assert out.returncode == 0, out.stderr
    restored_url = f"sqlite:///{restored / 'lytestream.db'}"
    held = result_identifiers(restored_url)
    acked_before = {ident for at, ident in feed.acked if at < began}
    assert acked_before <= held, "a result acknowledged before the backup began is missing from it"
    assert len(held) < len(feed.acked), "the backup holds results sent after it: not one moment"

    ctx = build_context(Settings(data_dir=replayed, base_url="http://testserver/fhir", scheduler=False))
    try:
        client: TestClient
        with authorised_client(ctx) as client:
            for body in _raw_requests(restored_url):
                assert client.post("/fhir", content=body, headers=HEADERS).status_code == 200
    finally:
        ctx.db.dispose()
    flags = flag_signatures(restored_url)
    print(f"\nbackup under load: {len(held)} results, {len(flags)} Flags, backup took {took:.2f} s "
          f"with {at_backup - 30} bundle(s) acknowledged meanwhile")
    assert {f[1] for f in flags} >= {"sodium-critical-low", "sodium-rise-too-fast"}
    assert {f[2] for f in flags} >= {"active", "inactive"}
    assert flag_signatures(f"sqlite:///{replayed / 'lytestream.db'}") == flags
