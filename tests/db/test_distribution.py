"""The layout README "Past one PostgreSQL primary" proposes for a distributed PostgreSQL (Citus),
checked against the schema on paper: every table placed, each distribution key a real column, the
constraints named as lacking the key exactly those that do (Citus requires the key in every primary
key and unique constraint), and the rule queries filtering by patient_key so each stays on the
shards of its patients."""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import MetaData, PrimaryKeyConstraint, Table, UniqueConstraint, event
from sqlmodel import SQLModel

import service.auth.tables  # noqa: F401  (registers api_token on the metadata)
import service.db.tables  # noqa: F401
from service.db.engine import Database
from service.db.flags import open_flags
from service.db.timeline import load_timelines

README = Path(__file__).resolve().parents[2] / "README.md"
PLACEMENTS = ("distributed", "reference", "local")


def _layout() -> dict[str, tuple[str, str, set[str]]]:
    """table -> (placement, distribution key, constraints to widen), from the README's table."""
    text = README.read_text("utf-8")
    section = text.split("### Past one PostgreSQL primary", 1)[1].split("\n#", 1)[0]
    rows: dict[str, tuple[str, str, set[str]]] = {}
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) != 4 or cells[0] in ("table", "---"):
            continue
        widen = {re.sub(r" \(.*\)$", "", c.strip()) for c in cells[3].split(",") if c.strip()}
        rows[cells[0]] = (cells[1], cells[2], widen)
    assert rows, "the README's distribution table was not found"
    return rows


def _tables() -> dict[str, Table]:
    return {t.name: t for t in SQLModel.metadata.sorted_tables}


def _unique_sets(table: Table) -> dict[str, set[str]]:
    """Every primary key, unique constraint and unique index, by name (PostgreSQL's name for the key)."""
    out = {}
    for c in table.constraints:
        if isinstance(c, PrimaryKeyConstraint):
            out[c.name or f"{table.name}_pkey"] = {col.name for col in c.columns}
        elif isinstance(c, UniqueConstraint):
            out[str(c.name)] = {col.name for col in c.columns}
    for index in table.indexes:
        if index.unique:
            out[str(index.name)] = {col.name for col in index.columns}
    return out


def test_every_table_is_placed_once_and_nothing_else_is() -> None:
    layout = _layout()
    assert set(layout) == set(_tables()) | {"alembic_version"}
    for name, (placement, _, _) in layout.items():
        assert re.split(r"[ ,(]", placement)[0] in PLACEMENTS, f"{name}: placement {placement!r}"


def test_each_distribution_key_is_a_column_of_its_table() -> None:
    for name, (placement, key, _) in _layout().items():
        if placement.startswith("distributed"):
            assert key in _tables()[name].c, f"{name} has no column {key}"
            assert not _tables()[name].c[key].nullable or _tables()[name].c[key].primary_key, \
                f"{name}.{key} may be NULL: Citus refuses a row without its distribution value"
        else:
            assert key == "", f"{name} is not distributed but names a key"


def test_the_rule_tables_are_co_located_on_patient_key_with_an_index_leading_with_it() -> None:
    for name in ("observation", "insulin_administration", "flag"):
        placement, key, _ = _layout()[name]
        assert placement == "distributed, co-located" and key == "patient_key"
        leading = {index.columns[0].name for index in _tables()[name].indexes}
        assert "patient_key" in leading, f"{name}: no index leads with patient_key"


def test_the_constraints_listed_to_widen_are_exactly_those_without_the_key() -> None:
    for name, (placement, key, widen) in _layout().items():
        if not placement.startswith("distributed"):
            assert widen == set()
            continue
        lacking = {c for c, cols in _unique_sets(_tables()[name]).items() if key not in cols}
        assert lacking == widen, f"{name}: constraints without {key} are {sorted(lacking)}, README lists {sorted(widen)}"


def test_reference_tables_hold_no_patient_data() -> None:
    # A reference table is copied to every node: nothing that names a patient belongs in one.
    for name, (placement, _, _) in _layout().items():
        if placement == "reference":
            columns = set(_tables()[name].c.keys())
            assert not columns & {"patient_key", "subject_reference", "alias"}, name


def test_the_rule_queries_filter_every_patient_table_by_patient_key(tmp_path: Path) -> None:
    db = Database(f"sqlite:///{tmp_path / 'lytestream.db'}")
    db.create_schema()
    statements: list[str] = []

    @event.listens_for(db.engine, "before_cursor_execute")
    def _seen(conn: Any, cursor: Any, statement: str, *args: Any) -> None:
        statements.append(" ".join(statement.split()))

    try:
        with db.session() as session:
            load_timelines(session=session, patient_keys=["k1", "k2"], end=datetime(2026, 3, 2, tzinfo=UTC),
                           lookback=timedelta(hours=72))
            open_flags(session=session, patient_keys=["k1", "k2"])
    finally:
        db.dispose()
    reads = [s for s in statements if s.startswith("SELECT")]
    touched = {t for s in reads for t in re.findall(r"\bFROM (\w+)", s)}
    assert touched == {"observation", "insulin_administration", "flag"}
    for s in reads:
        (table,) = re.findall(r"\bFROM (\w+)", s)
        assert re.search(rf"WHERE .*\b{table}\.patient_key IN \(", s), f"not filtered by patient_key: {s}"


@pytest.mark.parametrize("table", ["observation", "flag"])
def test_the_check_sees_a_constraint_that_would_break_distribution(table: str) -> None:
    # The comparison above is a real one: a unique constraint without the key shows up as lacking it.
    t = _tables()[table].to_metadata(MetaData())  # a copy: the service's metadata stays as it is
    t.append_constraint(UniqueConstraint("id", name=f"uq_probe_{table}"))
    assert f"uq_probe_{table}" in {c for c, cols in _unique_sets(t).items() if "patient_key" not in cols}
