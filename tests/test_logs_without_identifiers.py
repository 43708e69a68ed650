"""A server whose database refuses writes logs the failure without the request's identifiers.

SQL parameters (patient aliases, so identifiers such as an MRN) and the database's own error
details ("Failing row contains (…)") must not reach the log, whichever database it is.
"""

# Sodium 131 mmol/L: in range, no Flag (RCPath G158 2017 critical limits 120/160 mmol/L).

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from sqlalchemy import create_engine, text

from service.notify.topics import FLAG_CHANGED
from tests.factories import HEADERS, LAB, bundle, dumps, observation
from tests.servers import clean_env, free_port, start_server

pytestmark = pytest.mark.slow

MRN = "MRN-REFUSED-4711"
OTHER_MRN = "MRN-REFUSED-4712"
RESULT_ID = "result-refused-0815"


def refuse_these_aliases(database_url: str) -> None:
    """Make the database itself refuse to link aliases naming our MRNs: a real error from it."""
    engine = create_engine(database_url)
    with engine.begin() as conn:
        if engine.dialect.name == "sqlite":
            conn.execute(text("CREATE TRIGGER drill_refuses BEFORE INSERT ON patient_alias "
                              "WHEN NEW.alias LIKE '%MRN-REFUSED%' BEGIN SELECT RAISE(ABORT, 'refused'); END"))
        else:
            conn.execute(text("ALTER TABLE patient_alias ADD CONSTRAINT drill_refuses "
                              "CHECK (alias NOT LIKE '%MRN-REFUSED%')"))
    engine.dispose()


def test_database_errors_are_logged_without_identifiers(database_url: str, tmp_path: Path) -> None:
    env = clean_env(LYTESTREAM_DATABASE_URL=database_url, LYTESTREAM_DATA_DIR=str(tmp_path))

    def cli(*args: str) -> str:
        return subprocess.run([sys.executable, "-m", "service", *args], capture_output=True, text=True,
                              check=True, env=env).stdout.strip()

    cli("db", "upgrade")
    token = cli("token", "create", "--client", "drill", "--scope", "system/*.cruds")
    refuse_these_aliases(database_url)
    auth = {**HEADERS, "Authorization": f"Bearer {token}"}
    port = free_port()
    log_path = tmp_path / "server.log"
    proc = start_server(port, env=env, log=log_path)
    try:
        by_identifier = observation(RESULT_ID, value=131, subject={
            "identifier": {"system": "https://hospital.example.org/mrn", "value": MRN}})
        by_reference = observation(f"{RESULT_ID}-b", value=131, patient=f"Patient/{OTHER_MRN}")
        statuses = [httpx.post(f"http://127.0.0.1:{port}/fhir", content=dumps(bundle(kind, *resources)),
                               headers=auth, timeout=30).status_code
                    for kind, resources in (("transaction", [by_identifier, by_reference]),
                                            ("batch", [by_identifier]), ("transaction", [by_reference]))]
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    logged = log_path.read_text(errors="replace")
    assert 500 in statuses  # the refusal really failed requests...
    assert "IntegrityError" in logged  # ...and was logged
    for identifier in (MRN, OTHER_MRN, RESULT_ID):
        assert identifier not in logged


# Invented patients and values for the run below. Sodium 118 mmol/L is under the critical low of
# 120 mmol/L and potassium 6.9 mmol/L over the critical high of 6.5 mmol/L (RCPath G158 2017), so Flags
# are raised and notifications attempted; 131.7 mmol/L is in range. The decimals make the values easy to
# find in a log if they ever leak.
LOGGED_MRNS = ("MRN-LOGRUN-5501", "MRN-LOGRUN-5502")
LOGGED_IDS = ("obs-logrun-sodium-a", "obs-logrun-potassium-b", "obs-logrun-sodium-c")
LOGGED_VALUES = ("118.3", "6.93", "131.7")


def test_a_busy_run_leaves_no_identifier_or_value_outside_the_database(tmp_path: Path) -> None:
    """Ingest (batch, single, conditional update by identifier), searches by patient, a subscription whose
    endpoint is dead, at log level debug: neither the log nor any file in the data directory but the
    database itself holds an identifier or a value."""
    data = tmp_path / "data"
    env = clean_env(LYTESTREAM_DATA_DIR=str(data), LYTESTREAM_METRICS="open", LYTESTREAM_DELIVER_SECONDS="0.5",
                    LYTESTREAM_ALLOW_HTTP_ENDPOINTS="true")
    token = subprocess.run([sys.executable, "-m", "service", "token", "create", "--client", "logrun", "--scope",
                            "system/*.cruds"], capture_output=True, text=True, check=True, env=env).stdout.strip()
    auth = {**HEADERS, "Authorization": f"Bearer {token}"}
    port = free_port()
    log_path = tmp_path / "server.log"
    proc = start_server(port, "--log-level", "debug", env=env, log=log_path)
    base = f"http://127.0.0.1:{port}/fhir"
    try:
        dead = f"http://127.0.0.1:{free_port()}/hook"
        sub = {"resourceType": "Subscription", "status": "requested", "reason": "log drill",
               "criteria": FLAG_CHANGED,
               "channel": {"type": "rest-hook", "endpoint": dead, "payload": "application/fhir+json"}}
        subscribed = httpx.post(f"{base}/Subscription", content=dumps(sub), headers=auth, timeout=30)
        a = observation(LOGGED_IDS[0], value=float(LOGGED_VALUES[0]), subject={
            "identifier": {"system": "https://hospital.example.org/mrn", "value": LOGGED_MRNS[0]}})
        b = observation(LOGGED_IDS[1], value=float(LOGGED_VALUES[1]), code="6298-4",
                        patient=f"Patient/{LOGGED_MRNS[1]}")
        c = observation(LOGGED_IDS[2], value=float(LOGGED_VALUES[2]), patient=f"Patient/{LOGGED_MRNS[1]}")
        statuses = [
            httpx.post(base, content=dumps(bundle("batch", a, b)), headers=auth, timeout=30).status_code,
            httpx.post(f"{base}/Observation", content=dumps(c), headers=auth, timeout=30).status_code,
            httpx.put(f"{base}/Observation", params={"identifier": f"{LAB}|{LOGGED_IDS[2]}"},
                      content=dumps(c), headers=auth, timeout=30).status_code,
            httpx.get(f"{base}/Observation", params={"patient": f"Patient/{LOGGED_MRNS[1]}"}, headers=auth,
                      timeout=30).status_code,
            httpx.get(f"{base}/Flag", params={"patient": f"Patient/{LOGGED_MRNS[0]}"}, headers=auth,
                      timeout=30).status_code,
            httpx.get(f"http://127.0.0.1:{port}/metrics", timeout=30).status_code,
        ]
        time.sleep(2)  # a few delivery passes at the dead endpoint
    finally:
        proc.terminate()
        proc.wait(timeout=20)
    assert subscribed.status_code == 201, subscribed.text
    assert statuses[0] == 200 and statuses[1] in (200, 201) and statuses[3:] == [200, 200, 200], statuses
    logged = log_path.read_text(errors="replace")
    lines = [json.loads(line) for line in logged.splitlines() if line.startswith("{")]
    assert any(line.get("message") == "request" and line.get("route") == "/fhir" for line in lines)
    assert any(line.get("message") == "delivery attempt" and line.get("outcome") == "retry" for line in lines)
    assert any(line.get("message") == "evaluation" and line.get("patients") == 2 for line in lines)
    others = {p: p.read_bytes().decode(errors="replace") for p in data.rglob("*")
              if p.is_file() and not p.name.startswith("lytestream.db")}
    for secret in (*LOGGED_MRNS, *LOGGED_IDS, *LOGGED_VALUES):
        assert secret not in logged, secret
        assert not [p for p, text in others.items() if secret in text], secret
