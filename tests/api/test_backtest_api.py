"""``POST /fhir/$backtest``: 202 with a status URL, polled to a Parameters answer; bad input is a 4xx
OperationOutcome.

Sodium 118 mmol/L is at or below the critical low of 120 mmol/L (RCPath G158 2017), so it raises one
sodium-critical-low Flag under both policies; potassium 6.3 is below the default critical high of 6.5
(RCPath G158 2017) and at or above the candidate's 6.2 (Campbell CA et al, Clin Chem Lab Med
2018;57:89-94), so the candidate gains one potassium-critical-high Flag.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import orjson
from fastapi.testclient import TestClient

from service.api.context import AppContext
from tests.api.test_summary_api import figures
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation

_DEFAULT = (Path(__file__).resolve().parents[2] / "service" / "policy" / "default.toml").read_text("utf-8")
_OLD = 'high = 6.5  # RCPath G158 2017 (">=6.5"); alternative 6.2'
CANDIDATE = _DEFAULT.replace(_OLD, 'high = 6.2  # Campbell 2018; was RCPath G158 2017 (">=6.5"); alternative 6.2')


def params(**values: str) -> bytes:
    return orjson.dumps({"resourceType": "Parameters",
                         "parameter": [{"name": k, "valueString": v} for k, v in values.items()]})


def poll(client: TestClient, url: str) -> Any:
    path = url.split("/fhir", 1)[1]
    for _ in range(200):
        r = client.get(f"/fhir{path}")
        if r.status_code != 202:
            return r
        time.sleep(0.05)
    raise AssertionError("the backtest did not finish")


def test_a_backtest_is_accepted_then_polled_to_its_figures(client: TestClient) -> None:
    assert _DEFAULT.count(_OLD) == 1
    r = client.post("/fhir", content=dumps(bundle("batch", observation("na", value=118, patient="Patient/p1"),
                                                  observation("k", code="2823-3", value=6.3, patient="Patient/p2"))),
                    headers=HEADERS)
    assert r.status_code == 200
    r = client.post("/fhir/$backtest", content=params(start="2026-03-02", end="2026-03-03", policy=CANDIDATE),
                    headers=HEADERS)
    assert r.status_code == 202, r.text
    done = poll(client, r.headers["content-location"])
    assert done.status_code == 200, done.text
    result = figures(done.json()["parameter"])
    assert (result["baseline"]["flags_raised"], result["candidate"]["flags_raised"]) == (1, 2)
    assert result["flags_gained"] == {"count": 1, "by_rule": {"potassium-critical-high": 1}}
    assert result["flags_lost"] == {"count": 0}
    assert "Patient/p2" not in done.text  # figures only


def test_the_status_url_is_not_answered_to_another_client(client: TestClient, context: AppContext) -> None:
    r = client.post("/fhir/$backtest", content=params(start="2026-03-02", end="2026-03-03", policy=_DEFAULT),
                    headers=HEADERS)
    path = r.headers["content-location"].split("/fhir", 1)[1]
    with authorised_client(context, client="someone-else") as stranger:
        assert stranger.get(f"/fhir{path}").status_code == 404
    assert poll(client, r.headers["content-location"]).status_code == 200


def test_a_policy_with_an_unknown_key_is_a_400_naming_it(client: TestClient) -> None:
    bad = _DEFAULT.replace("[sodium.rise]", "[sodium.rise]\nlimit_2h = 1.0")
    r = client.post("/fhir/$backtest", content=params(start="2026-03-02", end="2026-03-03", policy=bad),
                    headers=HEADERS)
    assert r.status_code == 400
    assert "limit_2h" in r.json()["issue"][0]["diagnostics"]


def test_a_missing_end_and_a_backwards_range_are_refused(client: TestClient) -> None:
    r = client.post("/fhir/$backtest", content=params(start="2026-03-02", policy=_DEFAULT), headers=HEADERS)
    assert r.status_code == 400 and "end" in r.json()["issue"][0]["diagnostics"]
    r = client.post("/fhir/$backtest", content=params(start="2026-03-03", end="2026-03-02", policy=_DEFAULT),
                    headers=HEADERS)
    assert r.status_code == 400


def test_the_old_range_names_are_unknown_parameters(client: TestClient) -> None:
    r = client.post("/fhir/$backtest", content=params(**{"from": "2026-03-02", "to": "2026-03-03",
                                                         "policy": _DEFAULT}), headers=HEADERS)
    assert r.status_code == 400 and "from" in r.json()["issue"][0]["diagnostics"]


def test_an_unknown_job_is_a_404_operation_outcome(client: TestClient) -> None:
    r = client.get("/fhir/$backtest-status/no-such-job")
    assert r.status_code == 404 and r.json()["resourceType"] == "OperationOutcome"
