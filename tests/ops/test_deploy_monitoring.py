"""deploy/grafana-dashboard.json and deploy/prometheus-alerts.yaml parse, and every metric they query is
one the service exposes (a renamed metric would leave a panel blank and an alert silent)."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import time
from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
import yaml
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from service.api.context import AppContext
from service.clock import FixedClock
from tests.api.test_subscriptions import hook, raise_flag, subscribe  # noqa: F401  (hook is a fixture)
from tests.conftest import authorised_client

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
METRIC = re.compile(r"\blytestream_[a-z_]+\b")


def dashboard_exprs() -> list[str]:
    dash = json.loads((DEPLOY / "grafana-dashboard.json").read_text())
    return [t["expr"] for p in dash["panels"] for t in p["targets"]]


def alert_rules() -> list[dict[str, Any]]:
    doc = yaml.safe_load((DEPLOY / "prometheus-alerts.yaml").read_text())
    return [rule for group in doc["groups"] for rule in group["rules"]]


@pytest.fixture
def exposed(context: AppContext, clock: FixedClock, hook: Any) -> set[str]:  # noqa: F811
    """Sample names of a scrape after a little of everything: ingest, a Flag, failed deliveries, and a real
    (short) scheduler run, since job lag comes from the scheduler's own submissions."""
    from service.jobs import run_job, start_scheduler

    context.settings = context.settings.model_copy(update={"metrics": "open", "deliver_seconds": 0.2})
    with authorised_client(context) as client:
        hook.respond(503)
        subscribe(client)
        raise_flag(client)
        scheduler = start_scheduler(context)
        try:
            time.sleep(0.7)
        finally:
            scheduler.shutdown(wait=True)
        clock.advance(timedelta(seconds=1))
        run_job(context, "recheck-flags")
        return sample_names(client)


def sample_names(client: TestClient) -> set[str]:
    text = client.get("/metrics").text
    return {s.name for family in text_string_to_metric_families(text) for s in family.samples}


def test_every_dashboard_panel_has_a_query() -> None:
    dash = json.loads((DEPLOY / "grafana-dashboard.json").read_text())
    assert dash["panels"] and all(p["targets"] and p["title"] for p in dash["panels"])
    assert len({p["id"] for p in dash["panels"]}) == len(dash["panels"])


def test_the_alert_rules_cover_the_outbox_deliveries_and_silent_feeds() -> None:
    rules = alert_rules()
    assert all({"alert", "expr", "annotations"} <= rule.keys() for rule in rules)
    used = " ".join(rule["expr"] for rule in rules)
    for metric in ("lytestream_outbox_oldest_age_seconds", "lytestream_delivery_attempts_total",
                   "lytestream_ingest_results_total"):
        assert metric in used


def test_every_metric_the_dashboard_and_alerts_use_is_exposed(exposed: set[str]) -> None:
    used = {m for expr in [*dashboard_exprs(), *(r["expr"] for r in alert_rules())] for m in METRIC.findall(expr)}
    assert used  # the check below must have something to check
    missing = sorted(used - exposed)
    assert not missing, f"queried but not exposed: {missing}"


@pytest.mark.skipif(shutil.which("promtool") is None, reason="promtool (Debian package prometheus) not installed")
def test_promtool_accepts_the_alert_rules() -> None:
    result = subprocess.run(["promtool", "check", "rules", str(DEPLOY / "prometheus-alerts.yaml")],
                            capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


@pytest.mark.skipif(shutil.which("promtool") is None, reason="promtool (Debian package prometheus) not installed")
def test_the_alerts_fire_as_their_unit_tests_say() -> None:
    """deploy/prometheus-alerts.test.yaml: a silent feed, a stuck outbox, a subscription that gave up."""
    result = subprocess.run(["promtool", "test", "rules", "prometheus-alerts.test.yaml"], cwd=DEPLOY,
                            capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr
