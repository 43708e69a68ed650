"""/metrics: off unless the setting opens it; Prometheus text whose counts follow real requests.

Sodium 118 mmol/L is below the critical low of 120 mmol/L (RCPath G158 2017 critical limits), so it
raises a Flag; 140 mmol/L is in range.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import timedelta
from typing import Any

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from service.api.context import AppContext
from service.clock import FixedClock
from tests.api.test_subscriptions import hook, raise_flag, subscribe  # noqa: F401  (hook is a fixture)
from tests.conftest import authorised_client
from tests.factories import HEADERS, bundle, dumps, observation


def scrape(client: TestClient) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    r = client.get("/metrics")
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/plain")
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(r.text) for s in family.samples}


def value(samples: dict[tuple[str, tuple[tuple[str, str], ...]], float], name: str, **labels: str) -> float:
    return sum(v for (n, ls), v in samples.items() if n == name and set(labels.items()) <= set(ls))


@pytest.fixture
def open_metrics(context: AppContext) -> Iterator[TestClient]:
    context.settings = context.settings.model_copy(update={"metrics": "open"})
    with authorised_client(context, client="lab-feed") as c:
        yield c


def test_metrics_are_off_by_default(client: TestClient) -> None:
    assert client.get("/metrics").status_code == 404


def test_token_mode_refuses_a_scrape_without_a_token(context: AppContext) -> None:
    context.settings = context.settings.model_copy(update={"metrics": "token"})
    with authorised_client(context) as c:
        assert c.get("/metrics").status_code == 200
        assert c.get("/metrics", headers={"Authorization": ""}).status_code == 401


def test_open_mode_answers_without_a_token(open_metrics: TestClient) -> None:
    assert open_metrics.get("/metrics", headers={"Authorization": ""}).status_code == 200


def test_ingest_results_are_counted_by_outcome_and_client(open_metrics: TestClient) -> None:
    before = scrape(open_metrics)
    r = open_metrics.post("/fhir", headers=HEADERS, content=dumps(bundle(
        "batch", observation("m-1", value=140), observation("m-2", value=140, code="0000-0"))))
    assert r.status_code == 200
    open_metrics.post("/fhir", headers=HEADERS, content=dumps(bundle("batch", observation("m-1", value=140))))
    after = scrape(open_metrics)
    for outcome, n in (("created", 1), ("unchanged", 1)):
        delta = (value(after, "lytestream_ingest_results_total", outcome=outcome, client="lab-feed")
                 - value(before, "lytestream_ingest_results_total", outcome=outcome, client="lab-feed"))
        assert delta == n, outcome
    assert value(after, "lytestream_ingest_results_total", client="lab-feed") \
        - value(before, "lytestream_ingest_results_total", client="lab-feed") == 3


def test_request_latency_is_labelled_by_route_template_not_path(open_metrics: TestClient) -> None:
    open_metrics.get("/fhir/Flag/no-such-flag-7")
    after = scrape(open_metrics)
    routes = {dict(ls).get("route") for (n, ls) in after if n == "lytestream_http_request_duration_seconds_count"}
    assert "/fhir/{rtype}/{rid}" in routes
    assert not any("no-such-flag-7" in (r or "") for r in routes)


def test_raised_flags_are_counted_by_rule_and_priority(open_metrics: TestClient) -> None:
    before = scrape(open_metrics)
    raise_flag(open_metrics, ident="m-low", value=118)
    after = scrape(open_metrics)
    raised = {ls: v - before.get((n, ls), 0.0) for (n, ls), v in after.items()
              if n == "lytestream_flag_changes_total" and dict(ls)["change"] == "raised"}
    assert sum(raised.values()) >= 1
    assert all(dict(ls)["rule"] and dict(ls)["priority"] for ls in raised)


def test_outbox_depth_and_age_follow_a_dead_endpoint(open_metrics: TestClient, context: AppContext,
                                                     clock: FixedClock, hook: Any) -> None:  # noqa: F811
    hook.respond(503)
    sub = subscribe(open_metrics)
    context.dispatcher.run_once()  # the handshake fails and stays queued
    clock.advance(timedelta(seconds=90))
    after = scrape(open_metrics)
    assert value(after, "lytestream_outbox_depth", subscription=sub["id"]) == 1
    assert value(after, "lytestream_outbox_oldest_age_seconds", subscription=sub["id"]) == 90
    assert value(after, "lytestream_delivery_attempts_total", kind="handshake", outcome="retry") >= 1
    hook.respond(200)
    clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
    context.dispatcher.run_once()
    drained = scrape(open_metrics)
    assert value(drained, "lytestream_outbox_depth", subscription=sub["id"]) == 0
    assert value(drained, "lytestream_outbox_oldest_age_seconds", subscription=sub["id"]) == 0


def test_the_pool_and_the_writer_queue_are_reported(open_metrics: TestClient) -> None:
    raise_flag(open_metrics, ident="m-w", value=140)
    after = scrape(open_metrics)
    assert ("lytestream_db_pool_connections", (("state", "in-use"),)) in after
    if open_metrics.app.state.ctx.db.is_sqlite:  # type: ignore[attr-defined]
        assert value(after, "lytestream_db_writer_wait_seconds_count") >= 1
