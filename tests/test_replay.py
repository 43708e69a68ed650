"""`lytestream replay`: NDJSON in, idempotent transactions out, bad lines reported by number."""

from __future__ import annotations

import io
from pathlib import Path

import orjson
from fastapi.testclient import TestClient
from rich.console import Console

from service.replay import ReplaySummary, replay_file, to_entry
from tests.factories import observation


def write(path: Path, lines: list[bytes]) -> Path:
    path.write_bytes(b"\n".join(lines) + b"\n")
    return path


def test_replay_entry_is_a_conditional_update_by_identifier() -> None:
    entry = to_entry(observation("R7"))
    assert entry["request"] == {"method": "PUT", "url": "Observation?identifier=https://lab.example.org/result-id|R7"}


def test_replaying_a_file_twice_changes_nothing_the_second_time(client: TestClient, tmp_path: Path) -> None:
    feed = write(tmp_path / "feed.ndjson", [orjson.dumps(observation(f"R{i}", value=130 + i)) for i in range(7)])
    console = Console(file=io.StringIO())
    first = replay_file(feed, "http://testserver/fhir", bundle_size=3, console=console, client=client)
    second = replay_file(feed, "http://testserver/fhir", bundle_size=3, console=console, client=client)
    assert (first.stored, first.refused) == (7, 0)
    assert (second.stored, second.refused) == (7, 0)
    found = client.get("/fhir/Observation?_count=100").json()
    assert found["total"] == 7
    assert {e["resource"]["meta"]["versionId"] for e in found["entry"]} == {"1"}


def test_bad_lines_are_reported_and_good_ones_land(client: TestClient, tmp_path: Path) -> None:
    feed = write(tmp_path / "feed.ndjson", [
        orjson.dumps(observation("ok1")),
        b"{not json",
        orjson.dumps(observation("bad", status="bogus")),
        orjson.dumps(observation("ok2")),
    ])
    console = Console(file=io.StringIO())
    summary = replay_file(feed, "http://testserver/fhir", bundle_size=10, console=console, client=client)
    assert (summary.total, summary.stored, summary.refused) == (4, 2, 2)
    assert any(e.startswith("line 2:") for e in summary.errors)
    assert any(e.startswith("line 3: 400") for e in summary.errors)
    assert client.get("/fhir/Observation").json()["total"] == 2


def test_the_demo_ward_replays_without_a_refusal_when_its_day_is_over(context, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    # The feed holds one infusion twice (in progress, then completed): when a transaction falls back to a
    # batch, that pair must not fail the batch (it answered 500 once, and every resend the same).
    from datetime import UTC, datetime

    from tests.conftest import authorised_client

    context.clock.set(datetime(2026, 3, 3, 1, 0, tzinfo=UTC))  # after the feed's last time, 2026-03-02T23:55Z
    feed = Path(__file__).resolve().parents[1] / "fixtures" / "demo" / "ward.ndjson"
    with authorised_client(context) as client:
        summary = replay_file(feed, "http://testserver/fhir", bundle_size=100, console=Console(file=io.StringIO()),
                              client=client)
    assert summary.refused == 0, summary.errors[:3]
    assert summary.stored + summary.recorded + summary.dropped == summary.total
    assert summary.stored > 0


def test_dropped_entries_are_counted_as_dropped_not_accepted_and_suspect_codes_are_named(
    client: TestClient, tmp_path: Path
) -> None:
    # 2160-0 is creatinine in LOINC (not watched); 2951-3 has a wrong LOINC check digit (2951-2,
    # serum sodium, has 2 — LOINC Users' Guide, mod-10 check digit).
    patient = {"resourceType": "Patient", "identifier": [{"system": "https://hospital.example.org/mrn",
                                                          "value": "M1"}]}
    feed = write(tmp_path / "feed.ndjson", [
        orjson.dumps(observation("na")),
        orjson.dumps(observation("cr", code="2160-0", unit="umol/L")),
        orjson.dumps(observation("typo", code="2951-3")),
        orjson.dumps(patient),
    ])
    summary = replay_file(feed, "http://testserver/fhir", bundle_size=10, console=Console(file=io.StringIO()),
                          client=client)
    assert (summary.total, summary.stored, summary.dropped, summary.recorded, summary.refused) == (4, 1, 2, 1, 0)
    (warning,) = summary.warnings
    assert warning.startswith("line 3: not stored") and "2951-2" in warning


def test_the_summary_line_separates_stored_dropped_mistyped_and_refused_and_never_says_accepted() -> None:
    summary = ReplaySummary(total=7, stored=3, recorded=1, dropped=2, refused=1,
                            warnings=["line 4: not stored: 2951-3 is not a valid LOINC code …"])
    line = summary.headline()
    assert line == ("7 entries: stored 3, patient identities 1, dropped 2 (not watched; 1 of them under a "
                    "likely mistyped code, listed below), refused 1")
    assert "accepted" not in line
