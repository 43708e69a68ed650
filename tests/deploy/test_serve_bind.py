"""`serve` on every interface needs the public base URL: a guessed one would go into every
Location header and Bundle link clients follow."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from typer.testing import CliRunner

from service.cli import app

runner = CliRunner()


@pytest.fixture(autouse=True)
def _environment(monkeypatch: pytest.MonkeyPatch) -> None:
    """serve hands its settings to the workers through the environment; undo that after each test."""
    for name in ("LYTESTREAM_BASE_URL", "LYTESTREAM_DATABASE_URL", "LYTESTREAM_DATA_DIR"):
        monkeypatch.setenv(name, "")
        monkeypatch.delenv(name)


@pytest.mark.parametrize("host", ["0.0.0.0", "::"])
def test_serve_on_every_interface_without_a_base_url_exits_2_with_one_line(
    host: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    result = runner.invoke(app, ["serve", "--host", host, "--data-dir", str(tmp_path)])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and "LYTESTREAM_BASE_URL" in lines[0] and host in lines[0]
    assert "Traceback" not in result.output
    assert not (tmp_path / "lytestream.db").exists(), "refused before touching the database"


def test_an_explicit_base_url_lets_serve_past_the_bind_check(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import uvicorn

    ran: dict[str, object] = {}
    monkeypatch.setenv("LYTESTREAM_BASE_URL", "https://alerts.example.org/fhir")
    monkeypatch.setattr(uvicorn, "run", lambda *a, **kw: ran.update(kw))
    result = runner.invoke(app, ["serve", "--host", "0.0.0.0", "--data-dir", str(tmp_path)])
    assert result.exit_code == 0, result.output
    assert ran["host"] == "0.0.0.0"
    assert os.environ["LYTESTREAM_BASE_URL"] == "https://alerts.example.org/fhir"


def test_serve_on_loopback_still_defaults_the_base_url(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import uvicorn

    monkeypatch.setattr(uvicorn, "run", lambda *a, **kw: None)
    result = runner.invoke(app, ["serve", "--host", "127.0.0.1", "--port", "8099", "--data-dir", str(tmp_path)])
    assert result.exit_code == 0, result.output
    assert os.environ["LYTESTREAM_BASE_URL"] == "http://127.0.0.1:8099/fhir"
