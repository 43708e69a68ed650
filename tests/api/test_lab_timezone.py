"""Offset-less times read in LYTESTREAM_LAB_TIMEZONE through the API: clock changes are said, not guessed.

Europe/London 2026: clocks forward 29 March 01:00 GMT, back 25 October 02:00 BST (EU directive
2000/84/EC, IANA tz database), so 2026-03-29T01:30 does not exist and 2026-10-25T01:30 occurs twice.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.clock import FixedClock
from service.config import Settings
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation


def london(tmp_path: Path, clock: FixedClock, **extra: str) -> Iterator[TestClient]:
    # After both 2026 clock changes, so neither time is refused as collected in the future.
    clock.set(datetime(2026, 11, 1, 12, 0, tzinfo=UTC))
    ctx = build_context(Settings(data_dir=tmp_path, lab_timezone="Europe/London", scheduler=False, **extra),
                        clock=clock)
    with authorised_client(ctx) as c:
        yield c
    ctx.db.dispose()


@pytest.fixture
def refusing(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from london(tmp_path, clock)


@pytest.fixture
def accepting(tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    yield from london(tmp_path, clock, lab_timezone_transitions="accept")


def post(client: TestClient, effective: str) -> tuple[int, dict]:
    r = client.post("/fhir/Observation", content=dumps(observation(effective=effective)),
                    headers={**HEADERS, "prefer": "return=OperationOutcome"})
    return r.status_code, r.json()


@pytest.mark.parametrize(("effective", "says"), [("2026-10-25T01:30:00", "twice"),
                                                   ("2026-03-29T01:30:00", "does not exist")])
def test_a_doubtful_local_time_is_refused_by_default_with_its_fhirpath(
        refusing: TestClient, effective: str, says: str) -> None:
    status, outcome = post(refusing, effective)
    assert status == 422
    (issue,) = outcome["issue"]
    assert issue["severity"] == "error"
    assert issue["expression"] == ["Observation.effectiveDateTime"]
    assert says in issue["diagnostics"] and "Europe/London" in issue["diagnostics"]
    assert refusing.get("/fhir/Observation").json()["total"] == 0


@pytest.mark.parametrize(("effective", "says", "stored"), [
    ("2026-10-25T01:30:00", "twice", "2026-10-25T01:30:00+01:00"),  # the first occurrence, still BST
    ("2026-03-29T01:30:00", "does not exist", "2026-03-29T01:30:00+00:00"),  # the offset before the change
])
def test_a_doubtful_local_time_is_accepted_with_a_warning_naming_it_when_so_configured(
        accepting: TestClient, effective: str, says: str, stored: str) -> None:
    status, outcome = post(accepting, effective)
    assert status == 201
    # (an information note also says the result, months old, was judged in its own window)
    (issue,) = [i for i in outcome["issue"] if i["severity"] == "warning"]
    assert issue["severity"] == "warning" and says in issue["diagnostics"]
    held = accepting.get("/fhir/Observation").json()["entry"][0]["resource"]
    assert held["effectiveDateTime"] == stored


def test_a_doubtful_time_refuses_only_its_entry_in_a_batch(refusing: TestClient) -> None:
    r = refusing.post("/fhir", content=dumps(bundle("batch", observation("A", effective="2026-10-25T01:30:00"),
                                                    observation("B", effective="2026-10-25T03:30:00"))),
                      headers=HEADERS)
    bad, good = r.json()["entry"]
    assert bad["response"]["status"].startswith("422")
    assert good["response"]["status"].startswith("201")


def test_an_impossible_offsetless_date_is_a_4xx_not_a_crash(refusing: TestClient) -> None:
    status, outcome = post(refusing, "2026-02-30T10:00:00")
    assert 400 <= status < 500
    assert outcome["issue"][0]["expression"] == ["Observation.effectiveDateTime"]


def test_the_transition_setting_takes_only_refuse_or_accept() -> None:
    with pytest.raises(ValueError, match="lab_timezone_transitions"):
        Settings(lab_timezone_transitions="guess")
