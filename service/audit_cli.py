"""`lytestream audit …`: the informatics summary and its per-Flag export, straight from the store.

Read-only: nothing here writes to the database. The export names patients by internal key only.
"""

from __future__ import annotations

import csv
import io
from datetime import datetime
from pathlib import Path
from typing import Annotated

import orjson
import typer

from service.fhir.render import fhir_instant
from service.summary import FlagLine, Summary, parse_instant, summarise, summary_json

__all__ = ["CSV_COLUMNS", "audit_app", "export_csv"]

audit_app = typer.Typer(help="Informatics summary and per-Flag export of a date range [from, to).",
                        no_args_is_help=True)

CSV_COLUMNS = ("flag_id", "rule", "priority", "status", "patient_key", "raised_at", "evidence_at",
               "evidence_source", "seconds_result_to_flag", "first_acknowledged_at", "seconds_flag_to_ack",
               "escalations")

From = Annotated[str, typer.Option("--from", help="range start, included: 2026-03-01 or "
                                                  "2026-03-01T06:00:00Z")]
To = Annotated[str, typer.Option("--to", help="range end, excluded: 2026-03-03 covers up to 2 March's end")]
DatabaseUrl = Annotated[str | None, typer.Option(help="SQLAlchemy URL (default: SQLite in the data dir)")]
DataDir = Annotated[Path | None, typer.Option(help="where the embedded SQLite database lives")]


def _range(date_from: str, date_to: str) -> tuple[datetime, datetime]:
    try:
        start, end = parse_instant(date_from, "--from"), parse_instant(date_to, "--to")
    except ValueError as exc:
        typer.echo(str(exc), err=True)
        raise typer.Exit(code=2) from exc
    if end <= start:
        typer.echo("--to must be after --from (the range is [from, to))", err=True)
        raise typer.Exit(code=2)
    return start, end


def _summary(database_url: str | None, data_dir: Path | None, start: datetime, end: datetime) -> Summary:
    # Imported here: service.cli mounts this app, so importing it at the top would be circular.
    from sqlalchemy.exc import SQLAlchemyError

    from service.cli import _settings
    from service.db.engine import Database
    from service.db.summary import load_facts
    from service.policy import PolicyError, load_policy

    settings = _settings(database_url, data_dir)
    try:
        policy = load_policy(settings.policy_file, profile=settings.policy_profile)  # which results rules read
    except PolicyError as exc:
        typer.echo(f"site policy: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    db = Database(settings.resolved_database_url)
    try:
        with db.session() as session:
            facts = load_facts(session=session, start=start, end=end, policy=policy)
            return summarise(facts, start=start, end=end)
    except SQLAlchemyError as exc:
        typer.echo(f"could not read the store ({type(exc).__name__}); has `lytestream db upgrade` run?",
                   err=True)
        raise typer.Exit(code=2) from exc
    finally:
        db.dispose()


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, datetime):
        return fhir_instant(value)
    return str(value)


def export_csv(lines: tuple[FlagLine, ...]) -> str:
    """The cohort as CSV text, one row per Flag, columns as :data:`CSV_COLUMNS`."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for line in lines:
        writer.writerow([_cell(getattr(line, c)) for c in CSV_COLUMNS])
    return buf.getvalue()


@audit_app.command("export")
def export(date_from: From, date_to: To,
           out: Annotated[Path | None, typer.Option(help="CSV file to write (default: stdout)")] = None,
           database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """One CSV row per Flag first raised in [from, to): times, acknowledgement, escalations."""
    start, end = _range(date_from, date_to)
    text = export_csv(_summary(database_url, data_dir, start, end).lines)
    if out is None:
        typer.echo(text, nl=False)
    else:
        out.write_text(text, encoding="utf-8")
        typer.echo(f"wrote {text.count(chr(10)) - 1} flag row(s) to {out}", err=True)


@audit_app.command("summary")
def summary(date_from: From, date_to: To, database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """The summary of [from, to) as JSON (with its caution)."""
    start, end = _range(date_from, date_to)
    typer.echo(orjson.dumps(summary_json(_summary(database_url, data_dir, start, end)),
                            option=orjson.OPT_INDENT_2).decode())
