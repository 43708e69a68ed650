"""``token create`` prints the token alone on stdout; ``list`` never prints a secret."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from service.auth.cli import token_app
from service.auth.tables import ApiToken
from service.auth.tokens import looks_minted, verify_minted
from service.db.engine import Database

from .conftest import NOW

runner = CliRunner()  # click ≥ 8.2 keeps result.stdout and result.stderr apart


@pytest.fixture
def data_dir(tmp_path: Path) -> Path:
    """A data dir whose database has the schema plus the token table (until its migration lands)."""
    db = Database(f"sqlite:///{tmp_path / 'lytestream.db'}")
    db.create_schema()
    ApiToken.__table__.create(db.engine, checkfirst=True)  # type: ignore[attr-defined]
    db.dispose()
    return tmp_path


def test_create_prints_only_the_token_on_stdout(data_dir: Path) -> None:
    result = runner.invoke(token_app, ["create", "--client", "lab-interface-engine",
                                       "--scope", "system/Observation.cu", "--data-dir", str(data_dir)])
    assert result.exit_code == 0, result.stderr
    token = result.stdout.removesuffix("\n")
    assert "\n" not in token and looks_minted(token)
    assert "lab-interface-engine" in result.stderr and token not in result.stderr
    db = Database(f"sqlite:///{data_dir / 'lytestream.db'}")
    with db.session() as s:
        principal = verify_minted(s, token=token, now=NOW, touch=False)
    db.dispose()
    assert principal is not None and principal.client_id == "lab-interface-engine"


def test_database_url_option_reaches_the_same_store(data_dir: Path) -> None:
    url = f"sqlite:///{data_dir / 'lytestream.db'}"
    made = runner.invoke(token_app, ["create", "--client", "feed", "--scope", "system/Flag.rs",
                                     "--database-url", url])
    assert made.exit_code == 0, made.stderr
    listed = runner.invoke(token_app, ["list", "--data-dir", str(data_dir)])
    assert "\tfeed\tactive\t" in listed.stdout


def test_list_shows_tokens_without_secrets_and_revoke_marks_them(data_dir: Path) -> None:
    tokens = [runner.invoke(token_app, ["create", "--client", name, "--scope", "system/Flag.rs",
                                        "--data-dir", str(data_dir)]).stdout.strip() for name in ("a", "b")]
    revoked = runner.invoke(token_app, ["revoke", "--client", "a", "--data-dir", str(data_dir)])
    assert revoked.exit_code == 0 and "revoked 1" in revoked.stderr
    listed = runner.invoke(token_app, ["list", "--data-dir", str(data_dir)])
    assert listed.exit_code == 0
    lines = listed.stdout.splitlines()
    assert lines[0] == "id\tclient\tstatus\tcreated\tlast_used\tscope"
    assert [line.split("\t")[1:3] for line in lines[1:]] == [["a", "revoked"], ["b", "active"]]
    for token in tokens:
        assert token not in listed.stdout and token[4:] not in listed.stdout


def test_revoke_by_id_and_nothing_to_revoke(data_dir: Path) -> None:
    runner.invoke(token_app, ["create", "--client", "a", "--scope", "system/Flag.rs",
                              "--data-dir", str(data_dir)])
    assert runner.invoke(token_app, ["revoke", "--id", "1", "--data-dir", str(data_dir)]).exit_code == 0
    again = runner.invoke(token_app, ["revoke", "--id", "1", "--data-dir", str(data_dir)])
    assert again.exit_code == 1 and "nothing revoked" in again.stderr
    neither = runner.invoke(token_app, ["revoke", "--data-dir", str(data_dir)])
    assert neither.exit_code == 2


def test_a_scope_that_grants_nothing_is_refused_with_nothing_on_stdout(data_dir: Path) -> None:
    result = runner.invoke(token_app, ["create", "--client", "a", "--scope", "patient/Observation.rs",
                                       "--data-dir", str(data_dir)])
    assert result.exit_code == 2
    assert result.stdout == ""
    assert "system-to-system" in result.stderr
