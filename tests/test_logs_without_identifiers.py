"""A server whose database refuses writes logs the failure without the request's identifiers.

SQL parameters (patient aliases, so identifiers such as an MRN) and the database's own error
details ("Failing row contains (…)") must not reach the log, whichever database it is.
"""

# Sodium 131 mmol/L: in range, no Flag (RCPath G158 2017 critical limits 120/160 mmol/L).

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import httpx
import pytest
from sqlalchemy import create_engine, text

from tests.factories import HEADERS, bundle, dumps, observation
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
