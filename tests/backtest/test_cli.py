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


def test_with_identifiers_names_each_patient_as_the_feed_did(tmp_path: Path) -> None:
    out = tmp_path / "report"
    result = runner.invoke(app, ["backtest", "--policy", str(_DEFAULT), "--feed", str(DEFAULT_FEED), "--out", str(out),
                                 "--data-dir", str(tmp_path / "data"), "--with-identifiers"])
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader((out / "flags.csv").read_text("utf-8").splitlines()))
    assert rows and all(r["patient_identifiers"].startswith("Patient/ward-") for r in rows)


def test_without_identifiers_the_tables_name_no_patient(tmp_path: Path) -> None:
    out = tmp_path / "report"
    runner.invoke(app, ["backtest", "--policy", str(_DEFAULT), "--feed", str(DEFAULT_FEED), "--out", str(out),
                        "--data-dir", str(tmp_path / "data")])
    for table in ("flags.csv", "gained_lost.csv"):
        text = (out / table).read_text("utf-8")
        assert "patient_identifiers" not in text and "Patient/ward-" not in text


def test_identifiers_read_from_the_store_are_recorded_as_disclosures(tmp_path: Path) -> None:
    from sqlalchemy import select

    from service.config import Settings
    from service.db.engine import Database
    from service.db.tables import AuditRecord
    from service.demo import run_demo

    run_demo(DEFAULT_FEED, tmp_path / "store")  # the invented ward, stored as the live path stores it
    result = runner.invoke(app, ["backtest", "--policy", str(_DEFAULT), "--out", str(tmp_path / "report"),
                                 "--data-dir", str(tmp_path / "store"), "--with-identifiers"])
    assert result.exit_code == 0, result.output
    db = Database(Settings(data_dir=tmp_path / "store").resolved_database_url)
    with db.session() as session:
        subtypes = list(session.execute(select(AuditRecord.__table__.c.subtype)).scalars())  # type: ignore[attr-defined]
    db.dispose()
    patients = {r["patient_key"] for r in csv.DictReader((tmp_path / "report" / "flags.csv").read_text("utf-8")
                                                         .splitlines())}
    assert subtypes.count("disclose") == len(patients) > 0
