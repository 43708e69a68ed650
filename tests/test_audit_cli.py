"""`lytestream audit export|summary` on an embedded SQLite store: rows match what the test did."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import orjson
import pytest
from sqlalchemy import text
from typer.testing import CliRunner

from service.api.context import AppContext
from service.audit_cli import CSV_COLUMNS, audit_app
from service.clock import FixedClock
from service.config import Settings
from service.fhir.render import CAUTION
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation

runner = CliRunner()
RANGE = ["--start", "2026-03-02", "--end", "2026-03-03"]


@pytest.fixture
def store(sqlite_url: str, tmp_path: Path) -> Iterator[tuple[str, AppContext]]:
    """12:00 p1 sodium 118 issued 11:50 → one Flag; 12:07 it is acknowledged."""
    clock = FixedClock(datetime(2026, 3, 2, 12, 0, tzinfo=UTC))
    settings = Settings(database_url=sqlite_url, data_dir=tmp_path, base_url="http://testserver/fhir",
                        scheduler=False)
    ctx = build_context(settings, clock=clock)
    with authorised_client(ctx) as client:
        r = client.post("/fhir", content=dumps(bundle("batch", observation(
            "na1", value=118, patient="Patient/p1", issued="2026-03-02T11:50:00+00:00"))), headers=HEADERS)
        assert r.status_code == 200, r.text
        flag_id = client.get("/fhir/Flag").json()["entry"][0]["resource"]["id"]
        clock.advance(timedelta(minutes=7))
        acked = client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=b"", headers=HEADERS)
        assert acked.status_code == 200
    yield sqlite_url, ctx
    ctx.db.dispose()


def rows(text: str) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(text)))


def test_export_writes_one_row_per_flag_with_its_times(store: tuple[str, AppContext]) -> None:
    url, _ = store
    result = runner.invoke(audit_app, ["export", *RANGE, "--database-url", url])
    assert result.exit_code == 0, result.output
    (row,) = rows(result.stdout)
    assert {k: row[k] for k in ("rule", "raised_priority", "status", "raised_at", "evidence_at", "evidence_source",
                                "seconds_result_to_flag", "first_acknowledged_at", "seconds_flag_to_ack",
                                "escalations")} == {
        "rule": "sodium-critical-low", "raised_priority": "PH", "status": "active",
        "raised_at": "2026-03-02T12:00:00Z", "evidence_at": "2026-03-02T11:50:00Z",
        "evidence_source": "issued",
        "seconds_result_to_flag": "600.0", "first_acknowledged_at": "2026-03-02T12:07:00Z",
        "seconds_flag_to_ack": "420.0", "escalations": "0"}


def test_export_names_the_patient_by_internal_key_not_reference(store: tuple[str, AppContext]) -> None:
    url, ctx = store
    with ctx.db.session() as session:
        key = session.execute(text("SELECT patient_key FROM flag")).scalar_one()
    (row,) = rows(runner.invoke(audit_app, ["export", *RANGE, "--database-url", url]).stdout)
    assert row["patient_key"] == key and "Patient/p1" not in row.values()


def test_export_to_a_file_has_the_header_and_no_row_outside_the_range(store: tuple[str, AppContext],
                                                                      tmp_path: Path) -> None:
    url, _ = store
    out = tmp_path / "flags.csv"
    result = runner.invoke(audit_app, ["export", "--start", "2026-03-03", "--end", "2026-03-04",
                                       "--database-url", url, "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert out.read_text().splitlines() == [",".join(CSV_COLUMNS)]


def test_summary_prints_json_with_the_caution(store: tuple[str, AppContext]) -> None:
    url, _ = store
    result = runner.invoke(audit_app, ["summary", *RANGE, "--database-url", url])
    assert result.exit_code == 0, result.output
    body = orjson.loads(result.stdout)
    assert (body["flags_raised"], body["caution"]) == (1, CAUTION)


def test_a_backwards_range_exits_2(store: tuple[str, AppContext]) -> None:
    url, _ = store
    backwards = ["--start", "2026-03-03", "--end", "2026-03-02"]
    result = runner.invoke(audit_app, ["export", *backwards, "--database-url", url])
    assert result.exit_code == 2


def test_summary_counts_results_stored_but_not_evaluated(store: tuple[str, AppContext]) -> None:
    url, ctx = store
    with authorised_client(ctx) as client:
        r = client.post("/fhir", content=dumps(bundle("batch", observation("blank", value=None))), headers=HEADERS)
        assert r.status_code == 200, r.text
    result = runner.invoke(audit_app, ["summary", *RANGE, "--database-url", url])
    assert result.exit_code == 0, result.output
    body = orjson.loads(result.stdout)
    assert body["results_not_evaluated"] == {"count": 1, "by_reason": {"no-numeric-value": 1}}


def test_export_with_identifiers_adds_the_references_the_feed_sent(store: tuple[str, AppContext]) -> None:
    url, _ = store
    result = runner.invoke(audit_app, ["export", *RANGE, "--with-identifiers", "--database-url", url])
    assert result.exit_code == 0, result.output
    (row,) = rows(result.stdout)
    assert (row["patient_reference"], row["patient_identifiers"]) == ("Patient/p1", "Patient/p1")


def test_export_with_identifiers_is_recorded_as_one_disclosure_per_patient(store: tuple[str, AppContext]) -> None:
    url, ctx = store
    count = "SELECT count(*) FROM audit_event WHERE subtype = 'disclose'"
    with ctx.db.session() as session:
        before = session.execute(text(count)).scalar_one()
    runner.invoke(audit_app, ["export", *RANGE, "--database-url", url])
    with ctx.db.session() as session:
        assert session.execute(text(count)).scalar_one() == before  # without identifiers: nothing disclosed
    runner.invoke(audit_app, ["export", *RANGE, "--with-identifiers", "--database-url", url])
    with ctx.db.session() as session:
        (body,) = [orjson.loads(b) for (b,) in session.execute(text(
            "SELECT resource FROM audit_event WHERE subtype = 'disclose'"))][before:]
    patient = [e for e in body["entity"] if e.get("role", {}).get("code") == "1"]
    assert [e["what"] for e in patient] == [{"reference": "Patient/p1"}]
    assert any(e.get("what", {}).get("reference", "").startswith("Flag/") for e in body["entity"])


def test_the_old_range_option_names_are_gone(store: tuple[str, AppContext]) -> None:
    url, _ = store
    result = runner.invoke(audit_app, ["export", "--from", "2026-03-02", "--to", "2026-03-03", "--database-url", url])
    assert result.exit_code == 2  # one vocabulary: --start/--end, as the API's start/end


def test_export_names_the_person_who_acknowledged_beside_the_client(sqlite_url: str, tmp_path: Path) -> None:
    clock = FixedClock(datetime(2026, 3, 2, 12, 0, tzinfo=UTC))
    ctx = build_context(Settings(database_url=sqlite_url, data_dir=tmp_path, base_url="http://testserver/fhir",
                                 scheduler=False), clock=clock)
    with authorised_client(ctx) as client:
        client.post("/fhir", content=dumps(bundle("batch", observation("na1", value=118))), headers=HEADERS)
        flag_id = client.get("/fhir/Flag").json()["entry"][0]["resource"]["id"]
        who = b'{"resourceType":"Parameters","parameter":[{"name":"who","valueString":"RN Example"}]}'
        assert client.post(f"/fhir/Flag/{flag_id}/$acknowledge", content=who, headers=HEADERS).status_code == 200
    ctx.db.dispose()
    result = runner.invoke(audit_app, ["export", *RANGE, "--database-url", sqlite_url])
    (row,) = rows(result.stdout)
    assert row["acknowledged_by"] == "RN Example (test-suite)"
