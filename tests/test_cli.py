"""The command line: schema migration and settings wiring."""

from __future__ import annotations

from pathlib import Path

from sqlalchemy import create_engine, inspect
from typer.testing import CliRunner

from service.cli import app

runner = CliRunner()


def test_db_upgrade_creates_the_schema_in_the_data_dir(tmp_path: Path) -> None:
    result = runner.invoke(app, ["db", "upgrade", "--data-dir", str(tmp_path)])
    assert result.exit_code == 0, result.output
    engine = create_engine(f"sqlite:///{tmp_path / 'lytestream.db'}")
    tables = set(inspect(engine).get_table_names())
    engine.dispose()
    assert {"observation", "fhir_version", "patient_alias", "alembic_version"} <= tables


def test_db_upgrade_twice_is_harmless(tmp_path: Path) -> None:
    for _ in range(2):
        assert runner.invoke(app, ["db", "upgrade", "--data-dir", str(tmp_path)]).exit_code == 0


def test_replay_of_a_missing_file_fails_with_a_message(tmp_path: Path) -> None:
    result = runner.invoke(app, ["replay", str(tmp_path / "nope.ndjson")])
    assert result.exit_code != 0


def test_policy_show_prints_the_default_with_its_hash() -> None:
    from service.policy import load_policy, policy_hash

    result = runner.invoke(app, ["policy", "show"])
    assert result.exit_code == 0, result.output
    assert policy_hash(load_policy()) in result.output


def test_policy_check_names_the_bad_key(tmp_path: Path) -> None:
    from importlib import resources

    text = resources.files("service.policy").joinpath("default.toml").read_text("utf-8")
    bad = tmp_path / "bad.toml"
    bad.write_text(text.replace("limit_24h = 10.0", "limit_24h = -1.0", 1))
    result = runner.invoke(app, ["policy", "check", str(bad)])
    assert result.exit_code == 2
    assert "sodium.rise.limit_24h" in result.output


def test_policy_check_accepts_the_default_file(tmp_path: Path) -> None:
    from importlib import resources

    good = tmp_path / "good.toml"
    good.write_text(resources.files("service.policy").joinpath("default.toml").read_text("utf-8"))
    result = runner.invoke(app, ["policy", "check", str(good)])
    assert result.exit_code == 0 and "policy ok" in result.output
