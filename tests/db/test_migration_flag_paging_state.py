"""Revision 0003_flag_paging_state on a store that already holds Flags: their priority is taken to have begun when
they were raised (acknowledgements already made keep covering them), and nothing is recorded as paged on
the responder topic (so their next version pages there)."""

from __future__ import annotations

from datetime import UTC, datetime

from sqlalchemy import text

from service.db.engine import Database
from service.db.migrate import upgrade

RAISED = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)


def test_flags_raised_before_the_revision_keep_their_raise_time_as_priority_start(database_url: str) -> None:
    db = Database(database_url)
    upgrade(db, "0001")
    with db.engine.begin() as conn:
        conn.execute(text(
            "INSERT INTO flag (id, patient_key, rule, episode, status, priority, period_start, evidence, numbers,"
            " sentence, policy_hash, raised_at, version_id, last_updated) VALUES ('f1', 'p1',"
            " 'sodium-critical-low', '2026-03-02T08:00:00Z', 'active', 'high', :t, '[]', '{}', 's', 'h', :t, 1, :t)"
        ), {"t": RAISED})
    upgrade(db)
    with db.engine.connect() as conn:
        row = conn.execute(text("SELECT priority_since, raised_at, alerted_priority, alerted_measure FROM flag")).one()
    db.dispose()
    assert row.priority_since == row.raised_at
    assert (row.alerted_priority, row.alerted_measure) == (None, None)


def test_the_revision_downgrades_to_the_initial_schema(database_url: str) -> None:
    from alembic import command
    from sqlalchemy import inspect

    from service.db.migrate import alembic_config

    db = Database(database_url)
    upgrade(db)
    cfg = alembic_config(db.url)
    with db.engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.downgrade(cfg, "0001")
    columns = {c["name"] for c in inspect(db.engine).get_columns("flag")}
    db.dispose()
    assert not columns & {"priority_since", "alerted_priority", "alerted_measure"}
