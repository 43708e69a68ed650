"""`lytestream backtest` from the command line: the tables it writes and the input it refuses."""

from __future__ import annotations

import csv
from pathlib import Path

import orjson
from typer.testing import CliRunner

from service.cli import app
from service.demo import DEFAULT_FEED

runner = CliRunner()
_DEFAULT = Path(__file__).resolve().parents[2] / "service" / "policy" / "default.toml"


def test_a_policy_against_itself_on_the_demo_ward_writes_every_table_and_no_difference(tmp_path: Path) -> None:
    out = tmp_path / "report"
    result = runner.invoke(app, ["backtest", "--policy", str(_DEFAULT), "--feed", str(DEFAULT_FEED),
                                 "--out", str(out), "--data-dir", str(tmp_path / "data")])
    assert result.exit_code == 0, result.output
    assert {p.name for p in out.iterdir()} >= {"by_rule.csv", "flags.csv", "gained_lost.csv", "per_day.csv",
                                                "summary.json"}
    assert list(csv.reader((out / "gained_lost.csv").read_text("utf-8").splitlines()))[1:] == []
    summary = orjson.loads((out / "summary.json").read_bytes())
    assert summary["baseline"]["flags_raised"] == summary["candidate"]["flags_raised"] > 0
    assert "decision support" in summary["caution"].lower()


def test_an_offset_less_start_is_refused_naming_the_parameter(tmp_path: Path) -> None:
    result = runner.invoke(app, ["backtest", "--policy", str(_DEFAULT), "--feed", str(DEFAULT_FEED),
                                 "--start", "2026-03-01T00:00:00", "--out", str(tmp_path / "r"),
                                 "--data-dir", str(tmp_path / "data")])
    assert result.exit_code == 2
    assert "--start" in result.output and "offset" in result.output


def test_a_candidate_policy_with_a_bad_key_is_refused(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(_DEFAULT.read_text("utf-8").replace("[sodium.rise]", "[sodium.rise]\nlimit_2h = 1.0"), "utf-8")
    result = runner.invoke(app, ["backtest", "--policy", str(bad), "--out", str(tmp_path / "r"),
                                 "--data-dir", str(tmp_path / "data")])
    assert result.exit_code == 2
    assert "limit_2h" in result.output
