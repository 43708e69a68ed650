"""Every ``$summary`` figure recounted by hand from ``lytestream audit figures``' CSV files alone.

Sodium 118 mmol/L is at or below the critical low of 120 and potassium 6.9 at or above the critical high of
6.5 (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so each raises a high-priority (PH) Flag; sodium
138 raises nothing. 2951-3 fails the LOINC mod-10 check digit of sodium 2951-2 (LOINC users' guide), so
that result is dropped under a suspect code. Escalation after 15 min for PH: default.toml
[escalation.after_minutes] (common practice, no source).
"""

from __future__ import annotations

import csv
import math
from collections import Counter
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path
from typing import Any

import httpx
import orjson
import pytest
import respx
from typer.testing import CliRunner

from service.api.context import AppContext
from service.audit_cli import audit_app
from service.clock import FixedClock
from tests.api.test_summary_api import HOOK, client_for, flag_of, send, subscribe
from tests.factories import HEADERS, dumps, observation

runner = CliRunner()
RANGE = ["--start", "2026-03-02", "--end", "2026-03-03"]


def read(path: Path) -> list[dict[str, str]]:
    return list(csv.DictReader(path.read_text("utf-8").splitlines()))


def nearest(values: list[float], p: float) -> float | None:
    """Nearest rank, as the flags.csv header names it: the value at rank ceil(p/100 x n)."""
    ordered = sorted(values)
    return ordered[max(math.ceil(p / 100 * len(ordered)), 1) - 1] if ordered else None


@pytest.fixture
def exported(context: AppContext, clock: FixedClock, tmp_path: Path) -> Iterator[tuple[dict[str, Any], Path]]:
    """12:00 p1 Na 118 (issued 11:50) and p2 K 6.9 (issued 11:58) raise PH Flags; p3 Na 138; a blank
    result; a urine sodium; a sodium under 2951-3 (dropped). A subscriber's hook answers 200, 503, 200….
    After the retry wait (delivery cap + 1 s) and 5 min the sodium Flag is acknowledged with a note;
    11 min later the potassium Flag escalates."""
    with respx.mock(assert_all_called=False) as mock, client_for(context, "system/*.cruds") as api:
        mock.post(HOOK).side_effect = [httpx.Response(200), httpx.Response(503)] + [httpx.Response(200)] * 20
        subscribe(api)
        context.dispatcher.run_once()
        send(api, observation("na1", value=118, patient="Patient/p1", issued="2026-03-02T11:50:00+00:00"),
             observation("k1", code="2823-3", value=6.9, patient="Patient/p2", issued="2026-03-02T11:58:00+00:00"),
             observation("na2", value=138, patient="Patient/p3"),
             observation("blank", value=None, patient="Patient/p3"),
             observation("urine", code="2955-3", value=40, patient="Patient/p1"))
        r = api.post("/fhir", content=dumps({"resourceType": "Bundle", "type": "batch", "entry": [
            {"resource": observation("typo", code="2951-3", value=115), "request": {"method": "POST",
                                                                                  "url": "Observation"}}]}),
                     headers=HEADERS)
        assert r.status_code == 200, r.text
        context.dispatcher.run_once()
        clock.advance(timedelta(seconds=context.settings.delivery_cap_seconds + 1))
        context.dispatcher.run_once()
        sodium = flag_of(api, "sodium-critical-low")
        clock.advance(timedelta(minutes=5))
        note = {"resourceType": "Parameters", "parameter": [{"name": "note", "valueString": "seen, repeat sent"}]}
        r = api.post(f"/fhir/Flag/{sodium}/$acknowledge", content=orjson.dumps(note), headers=HEADERS)
        assert r.status_code == 200, r.text
        clock.advance(timedelta(minutes=11))
        context.evaluator.escalate(context.db, clock.now())
    url = context.settings.resolved_database_url
    out = tmp_path / "figures"
    result = runner.invoke(audit_app, ["figures", *RANGE, "--out", str(out), "--database-url", url])
    assert result.exit_code == 0, result.output
    shown = runner.invoke(audit_app, ["summary", *RANGE, "--database-url", url])
    assert shown.exit_code == 0, shown.output
    yield orjson.loads(shown.stdout), out


def test_flag_counts_by_rule_and_priority_recount_from_the_flag_rows(exported: tuple[dict[str, Any], Path]) -> None:
    summary, out = exported
    flags = read(out / "flags.csv")
    assert summary["flags_raised"] == len(flags) == 2
    assert summary["flags_by_rule"] == dict(Counter(f["rule"] for f in flags))
    assert summary["flags_by_priority"] == dict(Counter(f["raised_priority"] for f in flags)) == {"PH": 2}


def test_burden_and_results_not_evaluated_recount_from_the_result_rows(exported: tuple[dict[str, Any], Path]) -> None:
    summary, out = exported
    results, flags = read(out / "results.csv"), read(out / "flags.csv")
    days = {(r["patient_key"], r["patient_day_utc"]) for r in results}
    burden = summary["alert_burden"]
    assert (burden["results_stored"], burden["patient_days"]) == (len(results), len(days)) == (5, 3)
    assert burden["flags_per_1000_results"] == pytest.approx(len(flags) * 1000 / len(results))
    assert burden["flags_per_patient_day"] == pytest.approx(len(flags) / len(days))
    reasons = Counter(r["not_evaluated_reason"] for r in results if r["not_evaluated_reason"])
    assert summary["results_not_evaluated"] == {"count": sum(reasons.values()), "by_reason": dict(reasons)}
    assert dict(reasons) == {"no-numeric-value": 1, "urine": 1}


def context_wait() -> float:
    from service.config import Settings

    return Settings().delivery_cap_seconds + 1


def test_latencies_recount_from_the_flag_rows_by_nearest_rank(exported: tuple[dict[str, Any], Path]) -> None:
    summary, out = exported
    flags = read(out / "flags.csv")
    to_flag = [float(f["seconds_result_to_flag"]) for f in flags if f["seconds_result_to_flag"]]
    to_ack = [float(f["seconds_flag_to_ack"]) for f in flags if f["seconds_flag_to_ack"]]
    r2f, f2a = summary["result_to_flag"], summary["flag_to_acknowledgement"]
    assert (r2f["count"], r2f["median_seconds"], r2f["p90_seconds"]) == (
        len(to_flag), nearest(to_flag, 50), nearest(to_flag, 90)) == (2, 120.0, 600.0)
    assert (f2a["count"], f2a["median_seconds"], f2a["p90_seconds"]) == (
        len(to_ack), nearest(to_ack, 50), nearest(to_ack, 90))
    # acknowledged after the retry wait (delivery cap + 1 s) and 5 more minutes
    assert to_ack == [context_wait() + 300.0]
    assert f2a["unacknowledged"] == sum(1 for f in flags if not f["first_acknowledged_at"]) == 1
    assert r2f["median_minutes"] == pytest.approx(r2f["median_seconds"] / 60)


def test_escalations_recount_from_the_flag_rows(exported: tuple[dict[str, Any], Path]) -> None:
    summary, out = exported
    flags = read(out / "flags.csv")
    assert summary["escalations"] == {"count": sum(int(f["escalations"]) for f in flags),
                                      "flags_escalated": sum(1 for f in flags if int(f["escalations"]))}
    assert summary["escalations"]["count"] == 1


def test_notifications_recount_from_the_notification_rows(exported: tuple[dict[str, Any], Path]) -> None:
    summary, out = exported
    rows = read(out / "notifications.csv")
    n = summary["notifications"]
    assert n == {"count": len(rows), "delivered": sum(r["status"] == "delivered" for r in rows),
                 "retried": sum(int(r["delivery_tries"]) > 1 for r in rows),
                 "failed": sum(r["status"] == "given up" for r in rows),
                 "pending": sum(r["status"] == "pending" for r in rows),
                 "attempts": sum(int(r["delivery_tries"]) for r in rows)}
    assert n["retried"] >= 1 and n["count"] >= 3  # the handshake and an event per Flag; one retried


def test_audit_events_and_suspect_drops_recount_from_the_audit_rows(exported: tuple[dict[str, Any], Path]) -> None:
    summary, out = exported
    rows = read(out / "audit_events.csv")
    assert summary["audit_events_by_subtype"] == dict(sorted(Counter(r["subtype"] for r in rows).items()))
    drops: Counter[str] = Counter()
    for r in rows:
        if int(r["results_dropped_under_suspect_code"]):
            drops[r["client"]] += int(r["results_dropped_under_suspect_code"])
    assert summary["results_dropped_under_suspect_codes"] == {"count": sum(drops.values()), "by_client": dict(drops)}
    assert sum(drops.values()) == 1


def test_every_figure_of_the_summary_is_recounted_above(exported: tuple[dict[str, Any], Path]) -> None:
    # A figure added to $summary without a recount here fails this test.
    summary, _ = exported
    recounted = {"flags_raised", "flags_by_rule", "flags_by_priority", "alert_burden", "results_not_evaluated",
                 "results_dropped_under_suspect_codes", "result_to_flag", "flag_to_acknowledgement", "escalations",
                 "notifications", "audit_events_by_subtype"}
    not_figures = {"start", "end", "range", "definitions", "caution"}
    assert set(summary) == recounted | not_figures


def test_the_flag_rows_carry_sentence_value_acknowledgement_and_evidence(
        exported: tuple[dict[str, Any], Path]) -> None:
    _, out = exported
    sodium = next(f for f in read(out / "flags.csv") if f["rule"] == "sodium-critical-low")
    assert (sodium["value"], sodium["unit"]) == ("118", "mmol/L")
    assert (sodium["raised_priority_display"], sodium["current_priority"]) == ("High priority", "PH")
    assert sodium["acknowledged_by"] == "test-suite" and sodium["acknowledgement_note"] == "seen, repeat sent"
    assert "118" in sodium["sentence_as_raised"] and sodium["evidence"].startswith("Observation/")
    assert sodium["closed_at"] == "" and sodium["closed_why"] == ""
