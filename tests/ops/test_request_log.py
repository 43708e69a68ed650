"""One log line per request: request id (the sender's, echoed back, or a new one), the route template
(never the raw path or query, which can carry an identifier), status, duration, client, ingest counts."""

# Sodium 140 mmol/L is inside the reference interval (common practice): the log lines, not the rules,
# are under test.

from __future__ import annotations

import logging
from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.factories import HEADERS, bundle, dumps, observation


def request_lines(caplog: pytest.LogCaptureFixture) -> list[dict[str, Any]]:
    return [r.__dict__ for r in caplog.records if r.name == "lytestream.request"]


def test_a_senders_request_id_is_logged_and_echoed(client: TestClient, caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="lytestream.request"):
        r = client.get("/fhir/metadata", headers={"X-Request-ID": "lab-42.batch_7"})
    assert r.headers["x-request-id"] == "lab-42.batch_7"
    assert request_lines(caplog)[-1]["request_id"] == "lab-42.batch_7"


@pytest.mark.parametrize("given", ["", "x" * 65, "has space", "semi;colon"])
def test_an_unusable_request_id_is_replaced(given: str, client: TestClient, caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="lytestream.request"):
        r = client.get("/fhir/metadata", headers={"X-Request-ID": given})
    assert r.headers["x-request-id"] != given and len(r.headers["x-request-id"]) == 36
    assert request_lines(caplog)[-1]["request_id"] == r.headers["x-request-id"]


def test_the_line_names_the_route_template_not_the_identifier(client: TestClient,
                                                              caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="lytestream.request"):
        client.get("/fhir/Observation", params={"patient": "Patient/MRN-LOG-0042"})
        client.get("/fhir/Patient/MRN-LOG-0042")
    lines = request_lines(caplog)
    assert [line["route"] for line in lines[-2:]] == ["/fhir/Observation", "/fhir/{rtype}/{rid}"]
    assert "MRN-LOG-0042" not in caplog.text
    assert all(line["client"] == "test-suite" for line in lines[-2:])


def test_an_ingest_line_counts_entries_by_outcome(client: TestClient, caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="lytestream.request"):
        client.post("/fhir", headers=HEADERS, content=dumps(bundle(
            "batch", observation("log-1", value=140), observation("log-2", value=140, code="0000-0"))))
    line = request_lines(caplog)[-1]
    assert (line["route"], line["status"], line["entries"]) == ("/fhir", 200, 2)
    assert line["results"]["created"] == 1 and sum(line["results"].values()) == 2
    assert line["duration_ms"] > 0


def test_a_path_no_route_serves_is_logged_as_unmatched(client: TestClient, caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="lytestream.request"):
        assert client.get("/no/such/MRN-LOG-0043").status_code == 404
    assert request_lines(caplog)[-1]["route"] == "unmatched"
    assert "MRN-LOG-0043" not in caplog.text


def test_a_static_file_is_logged_by_its_mount_not_its_name(client: TestClient,
                                                           caplog: pytest.LogCaptureFixture) -> None:
    with caplog.at_level(logging.INFO, logger="lytestream.request"):
        assert client.get("/board/static/board.css").status_code == 200
    assert request_lines(caplog)[-1]["route"] == "/board/static"
