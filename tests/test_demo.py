"""`lytestream demo`: the invented ward through the real pipeline ends with the expected active flags."""

from __future__ import annotations

import json
from pathlib import Path

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
