"""Refused requests leave a trace: a BALP-shaped AuditEvent and a warning log line, with no patient data,
and a flood of refusals is recorded only up to a limit per client per minute, then counted."""

from __future__ import annotations

import logging
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from fhir.resources.R4B.auditevent import AuditEvent

from service.api.context import AppContext
from service.clock import FixedClock
from service.config import Settings
from service.main import build_context, create_app
from tests.conftest import authorised_client

PATIENT_ID = "https://hospital.example.org/mrn|MRN-445566"  # invented
UNAUTHENTICATED = "(unauthenticated)"


def audit_events(context: AppContext, agent: str) -> list[dict[str, Any]]:
    with authorised_client(context, client="security-officer") as officer:
        body = officer.get(f"/fhir/AuditEvent?agent={agent}&_count=500").json()
    return [e["resource"] for e in body.get("entry", [])]


def details(event: dict[str, Any]) -> dict[str, str]:
    return {d["type"]: d["valueString"] for e in event["entity"] for d in e.get("detail", [])}


@pytest.fixture
def limited(sqlite_url: str, tmp_path: Path, clock: FixedClock) -> Iterator[AppContext]:
    settings = Settings(database_url=sqlite_url, data_dir=tmp_path, base_url="http://testserver/fhir",
                        scheduler=False, refusal_audit_per_client=3, refusal_audit_overall=5)
    ctx = build_context(settings, clock=clock)
    yield ctx
    ctx.db.dispose()


def test_a_403_on_a_read_leaves_an_audit_event_with_outcome_4(context: AppContext) -> None:
    with authorised_client(context, scope="system/Observation.cu", client="lab-feed") as feed:
        assert feed.get("/fhir/Flag/some-flag").status_code == 403
    (event,) = audit_events(context, "lab-feed")
    assert event["outcome"] == "4"
    assert event["subtype"][0]["code"] == "read"
    assert "403" in event["outcomeDesc"] and "system/Flag.r" in event["outcomeDesc"]
    assert details(event)["http-status"] == "403"
    AuditEvent.model_validate(event)


def test_a_401_on_a_search_leaves_an_audit_event_without_the_query(context: AppContext) -> None:
    anonymous = TestClient(create_app(context=context))
    assert anonymous.get(f"/fhir/Flag?patient:identifier={PATIENT_ID}").status_code == 401
    (event,) = audit_events(context, UNAUTHENTICATED)
    assert event["outcome"] == "4"
    assert event["subtype"][0]["code"] == "search-type"
    assert details(event)["http-status"] == "401"
    assert "MRN-445566" not in str(event) and "hospital.example.org/mrn" not in str(event)


def test_a_refused_write_is_audited_too(context: AppContext) -> None:
    with authorised_client(context, scope="system/Flag.rs", client="dashboard") as dashboard:
        assert dashboard.post("/fhir/Observation", content=b"{}",
                              headers={"content-type": "application/fhir+json"}).status_code == 403
    (event,) = audit_events(context, "dashboard")
    assert event["subtype"][0]["code"] == "create" and event["outcome"] == "4"


def test_refusals_are_logged_as_warnings_without_patient_data(
        context: AppContext, caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.WARNING, logger="lytestream")
    anonymous = TestClient(create_app(context=context))
    anonymous.get(f"/fhir/Flag?patient:identifier={PATIENT_ID}")
    with authorised_client(context, scope="system/Observation.cu", client="lab-feed") as feed:
        feed.get("/fhir/Flag")
    refusals = [r for r in caplog.records if r.name == "lytestream.auth" and r.levelno >= logging.WARNING]
    assert [("status=401" in r.getMessage(), "status=403" in r.getMessage()) for r in refusals] == \
        [(True, False), (False, True)]
    assert "client=lab-feed" in refusals[1].getMessage()
    assert all("MRN-445566" not in r.getMessage() for r in caplog.records)


def test_a_flood_of_refusals_is_recorded_up_to_the_limit_then_counted(
        limited: AppContext, clock: FixedClock) -> None:
    with authorised_client(limited, scope="system/Observation.cu", client="lab-feed") as feed:
        for _ in range(10):
            assert feed.get("/fhir/Flag").status_code == 403
        assert len(audit_events(limited, "lab-feed")) == 3
        clock.advance(timedelta(seconds=61))
        assert feed.get("/fhir/Flag").status_code == 403
    events = audit_events(limited, "lab-feed")
    counted = [e for e in events if "suppressed" in details(e)]
    assert [details(e)["suppressed"] for e in counted] == ["7"]
    AuditEvent.model_validate(counted[0])
    assert len(events) == 3 + 1 + 1  # the first three, the count of the other seven, the one after the minute


def test_one_clients_flood_does_not_silence_another(limited: AppContext) -> None:
    with authorised_client(limited, scope="system/Observation.cu", client="noisy") as noisy:
        for _ in range(10):
            noisy.get("/fhir/Flag")
    with authorised_client(limited, scope="system/Observation.cu", client="quiet") as quiet:
        quiet.get("/fhir/Flag")
    assert len(audit_events(limited, "quiet")) == 1


def test_refusals_across_clients_are_capped_overall(limited: AppContext) -> None:
    for name in ("a", "b", "c"):
        with authorised_client(limited, scope="system/Observation.cu", client=f"feed-{name}") as feed:
            for _ in range(3):
                feed.get("/fhir/Flag")
    recorded = sum(len(audit_events(limited, f"feed-{name}")) for name in ("a", "b", "c"))
    assert recorded == 5
