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
