"""`lytestream demo`: the invented ward through the real pipeline ends with the expected active flags."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from service.cli import app
from service.demo import DEFAULT_FEED, run_demo

EXPECTED = json.loads((DEFAULT_FEED.parent / "expected.json").read_text())


def expected_active() -> dict[str, set[str]]:
    out: dict[str, set[str]] = {}
    for patient, entry in EXPECTED["patients"].items():
        rules = {r if isinstance(r, str) else r["rule"] for r in entry.get("rules", entry.get("active", []))}
        if rules:
            out[patient] = rules
    return out


def test_demo_through_the_service_ends_with_the_expected_active_flags(tmp_path: Path) -> None:
    flags, sent, stored = run_demo(DEFAULT_FEED, tmp_path)
    active: dict[str, set[str]] = {}
    for f in flags:
        if f.status == "active":
            active.setdefault(f.patient, set()).add(f.rule)
    assert active == expected_active()
    assert stored < sent  # unwatched analytes are acknowledged, not stored


def test_demo_command_prints_every_rule_with_its_sentence_and_the_caution() -> None:
    result = CliRunner().invoke(app, ["demo"])
    assert result.exit_code == 0, result.output
    for rules in expected_active().values():
        for rule in rules:
            assert rule in result.output
    assert "Decision support only" in result.output


def test_the_live_demo_moves_every_time_by_one_amount_and_keeps_each_interval() -> None:
    from datetime import timedelta

    from service.demo import read_feed, shifted
    from service.fhir.normalise import parse_datetime

    by = timedelta(days=275, hours=3, minutes=7)
    for _, resource in read_feed(DEFAULT_FEED):
        moved = shifted(resource, by)
        for key in ("effectiveDateTime", "issued"):
            if key in resource:
                assert parse_datetime(moved[key]) - parse_datetime(resource[key]) == by
        if "effectivePeriod" in resource:
            for end in resource["effectivePeriod"]:
                assert parse_datetime(moved["effectivePeriod"][end]) - parse_datetime(resource["effectivePeriod"][end]) == by
        assert moved["identifier"] == resource["identifier"] and moved.get("valueQuantity") == resource.get("valueQuantity")


@pytest.mark.slow  # two replays of the whole ward
def test_the_live_demo_raises_the_same_flags_as_the_demo(tmp_path: Path) -> None:
    from datetime import UTC, datetime

    import orjson

    from service.config import Settings
    from service.db.engine import Database
    from service.db.reads import FlagQuery, search_flags
    from service.demo import prepare_live_demo
    from service.fhir.normalise import parse_datetime

    expected = {(f.patient, f.rule, f.status) for f in run_demo(DEFAULT_FEED, tmp_path / "plain")[0]}
    now = datetime(2026, 12, 2, 15, 0, tzinfo=UTC)
    stored, token = prepare_live_demo(DEFAULT_FEED, tmp_path / "live", parse_datetime("2026-03-03T00:00:00Z"), now)
    assert token.startswith("lyt_") and stored > 200
    db = Database(Settings(data_dir=tmp_path / "live").resolved_database_url)
    with db.session() as session:
        rows, _ = search_flags(session=session, q=FlagQuery(sort="date", count=10_000))
    db.dispose()
    live = {(orjson.loads(r)["subject"]["reference"], orjson.loads(r)["code"]["coding"][0]["code"],
             orjson.loads(r)["status"]) for r in rows}
    assert live == expected
