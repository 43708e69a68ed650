"""The README's settings table is the Settings object's: every field (nested ones too) with a
description, and the table in the README is what the generator makes of them now."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydantic import BaseModel, Field

from service.config import Settings
from service.ops.settings_doc import END, START, rewrite, settings_rows, settings_table

README = Path(__file__).resolve().parents[2] / "README.md"


def test_the_readme_table_is_current() -> None:
    text = README.read_text()
    assert rewrite(text) == text, "stale: run python -m service.ops.settings_doc README.md"


def test_every_setting_and_nested_setting_has_a_row() -> None:
    variables = {v for v, _, _ in settings_rows()}
    assert {f"LYTESTREAM_{n.upper()}" for n in Settings.model_fields} <= variables
    for name in ("LOOKBACK_HOURS", "RECHECK_SECONDS", "AUTH__REQUIRE_AT_JWT_TYP", "AUTH__MODE", "LOG_LEVEL"):
        assert f"LYTESTREAM_{name}" in variables


def test_a_setting_without_a_description_is_refused() -> None:
    class Undocumented(BaseModel):
        documented: int = Field(default=1, description="has one")
        bare: int = 2

    with pytest.raises(ValueError, match="LYTESTREAM_BARE"):
        settings_rows(Undocumented)


def test_a_changed_default_makes_the_table_stale() -> None:
    table = "\n".join([START, settings_table(), END])
    changed = table.replace("| `LYTESTREAM_LOOKBACK_HOURS` | `72.0` |", "| `LYTESTREAM_LOOKBACK_HOURS` | `48.0` |")
    assert changed != table
    assert rewrite(changed) != changed
