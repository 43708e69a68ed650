"""`lytestream audit …`: the informatics summary, its per-Flag export and the rows behind every figure.

``summary`` and ``figures`` only read. ``export`` names patients by the store's internal key; with
``--with-identifiers`` it adds the references and identifiers the feeds sent, and records that
disclosure as one AuditEvent per patient (subtype ``disclose``) before writing anything.
Decision support only: the thresholds behind every Flag are site policy.
"""

from __future__ import annotations

import csv
import io
import uuid
from collections.abc import Iterable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import orjson
import typer

from service.fhir.render import CAUTION, fhir_instant
from service.summary import FlagLine, SummaryFacts, parse_instant, summarise, summary_json
from service.vocabulary import priority_code, priority_display

if TYPE_CHECKING:
    from service.config import Settings
    from service.db.engine import Database
    from service.policy import Policy

__all__ = ["CSV_COLUMNS", "audit_app", "export_csv", "figures_tables"]

audit_app = typer.Typer(help="Informatics summary, per-Flag export and the rows behind each figure, for a "
                             "date range [start, end).", no_args_is_help=True)

# Durations are seconds; percentiles in the summary are nearest-rank (median = 50th percentile by the
# same rule). Priorities are FHIR flag-priority codes (PH/PM/PL) with their display.
CSV_COLUMNS = ("flag_id", "rule", "raised_priority", "raised_priority_display", "current_priority",
               "current_priority_display", "status", "patient_key", "raised_at", "sentence_as_raised",
               "sentence_latest", "value", "unit", "evidence_at", "evidence_source", "seconds_result_to_flag",
               "first_acknowledged_at", "acknowledged_by", "acknowledgement_note", "seconds_flag_to_ack",
               "escalations", "closed_at", "closed_why", "evidence")
IDENTIFIER_COLUMNS = ("patient_reference", "patient_identifiers")
RESULT_COLUMNS = ("observation_id", "patient_key", "stored_at", "patient_day_utc", "not_evaluated_reason")
NOTIFICATION_COLUMNS = ("notification", "kind", "status", "created_at", "delivery_tries")
AUDIT_COLUMNS = ("audit_event", "recorded", "subtype", "client", "results_dropped_under_suspect_code")

Start = Annotated[str, typer.Option("--start", help="range start, included: 2026-03-01 or 2026-03-01T06:00:00Z")]
End = Annotated[str, typer.Option("--end", help="range end, excluded: 2026-03-03 covers up to 2 March's end")]
DatabaseUrl = Annotated[str | None, typer.Option(help="SQLAlchemy URL (default: SQLite in the data dir)")]
DataDir = Annotated[Path | None, typer.Option(help="where the embedded SQLite database lives")]


def _range(start: str, end: str) -> tuple[datetime, datetime]:
    try:
        low, high = parse_instant(start, "--start"), parse_instant(end, "--end")
    except ValueError as exc:
        typer.echo(str(exc), err=True)
        raise typer.Exit(code=2) from exc
    if high <= low:
        typer.echo("--end must be after --start (the range is [start, end))", err=True)
        raise typer.Exit(code=2)
    return low, high


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, datetime):
        return fhir_instant(value)
    return str(value)


def _csv(columns: Sequence[str], rows: Iterable[Sequence[object]]) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    writer.writerows([[_cell(v) for v in row] for row in rows])
    return buf.getvalue()


def _flag_cells(line: FlagLine) -> list[object]:
    return [line.flag_id, line.rule, priority_code(line.priority), priority_display(line.priority),
            priority_code(line.current_priority or line.priority),
            priority_display(line.current_priority or line.priority), line.status, line.patient_key,
            line.raised_at, line.sentence_as_raised, line.sentence_latest, line.value, line.unit, line.evidence_at,
            line.evidence_source, line.seconds_result_to_flag, line.first_acknowledged_at, line.acknowledged_by,
            line.acknowledgement_note, line.seconds_flag_to_ack, line.escalations, line.closed_at,
            line.closed_why, " ".join(line.evidence)]


def export_csv(lines: Sequence[FlagLine], identifiers: dict[str, list[str]] | None = None) -> str:
    """The cohort as CSV text, one row per Flag (columns :data:`CSV_COLUMNS`, then the patient's
    identifiers when ``identifiers`` is given)."""
    if identifiers is None:
        return _csv(CSV_COLUMNS, (_flag_cells(line) for line in lines))
    return _csv((*CSV_COLUMNS, *IDENTIFIER_COLUMNS),
                ([*_flag_cells(line), line.subject, "; ".join(identifiers.get(line.patient_key, []))]
                 for line in lines))


def figures_tables(facts: SummaryFacts, audit: Sequence[tuple[str, datetime, str, str, int]], *,
                   start: datetime, end: datetime) -> dict[str, str]:
    """The rows each ``$summary`` figure counts, as CSV text by file name (the Flags are ``export``'s)."""
    def within(t: datetime) -> bool:
        return start <= t < end

    results = sorted((r for r in facts.results if within(r.stored_at)), key=lambda r: (r.stored_at, r.observation_id))
    outbox = sorted((o for o in facts.outbox if within(o.created_at)), key=lambda o: o.event_id)
    status = {"sent": "delivered", "failed": "given up", "pending": "pending"}
    return {
        "results.csv": _csv(RESULT_COLUMNS, ([r.observation_id, r.patient_key, r.stored_at,
                                              r.stored_at.astimezone(UTC).date().isoformat(), r.not_evaluated]
                                             for r in results)),
        "notifications.csv": _csv(NOTIFICATION_COLUMNS, ([o.event_id, o.kind, status.get(o.status, o.status),
                                                          o.created_at, o.attempts] for o in outbox)),
        "audit_events.csv": _csv(AUDIT_COLUMNS, audit),
    }


def _store(database_url: str | None, data_dir: Path | None) -> tuple[Database, Policy, Settings]:
    # Imported here: service.cli mounts this app, so importing it at the top would be circular.
    from service.cli import _settings
    from service.db.engine import Database
    from service.policy import PolicyError, load_policy

    settings = _settings(database_url, data_dir)
    try:
        policy = load_policy(settings.policy_file, profile=settings.policy_profile)  # which results rules read
    except PolicyError as exc:
        typer.echo(f"site policy: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    return Database(settings.resolved_database_url), policy, settings


def _failed_read(exc: Exception) -> typer.Exit:
    typer.echo(f"could not read the store ({type(exc).__name__}); has `lytestream db upgrade` run?", err=True)
    return typer.Exit(code=2)


def _disclose(db: Database, settings: Settings, lines: Sequence[FlagLine]) -> None:
    """One disclosure AuditEvent per patient whose identifiers leave the store in this export."""
    from service.db.audit import record_audit
    from service.fhir.audit_render import AuditFacts, Requester

    now = datetime.now(UTC)
    who = Requester(client="command-line audit export", address=None, request_id=str(uuid.uuid4()))
    by_patient: dict[str, list[FlagLine]] = {}
    for line in lines:
        by_patient.setdefault(line.patient_key, []).append(line)
    events = []
    for key, flags in sorted(by_patient.items()):
        subject = flags[0].subject
        patient = {"reference": subject} if "|" not in subject else {
            "identifier": {"system": subject.split("|", 1)[0], "value": subject.split("|", 1)[1]}}
        events.append((AuditFacts(subtype="disclose", recorded=now, requester=who, patient=patient,
                                  what=[f"Flag/{f.flag_id}" for f in flags],
                                  details={"export": "audit CSV with patient identifiers",
                                           "flags": str(len(flags))}), key))
    with db.session(write=True) as session:
        record_audit(session=session, events=events, base_url=settings.base_url)


@audit_app.command("export")
def export(start: Start, end: End,
           out: Annotated[Path | None, typer.Option(help="CSV file to write (default: stdout)")] = None,
           with_identifiers: Annotated[bool, typer.Option(
               "--with-identifiers", help="add the patient references and identifiers the feeds sent "
                                          "(recorded as a disclosure AuditEvent per patient)")] = False,
           database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """One CSV row per Flag first raised in [start, end): priority, sentence, value, acknowledgement, closing."""
    from sqlalchemy.exc import SQLAlchemyError

    from service.db.patients import patient_identifiers
    from service.db.summary import load_facts

    low, high = _range(start, end)
    db, policy, settings = _store(database_url, data_dir)
    try:
        with db.session() as session:
            lines = summarise(load_facts(session=session, start=low, end=high, policy=policy),
                              start=low, end=high).lines
            identifiers = patient_identifiers(session=session, patient_keys=[line.patient_key for line in lines]) \
                if with_identifiers else None
        if with_identifiers and lines:
            _disclose(db, settings, lines)  # recorded before the identifiers are written anywhere
    except SQLAlchemyError as exc:
        raise _failed_read(exc) from exc
    finally:
        db.dispose()
    text = export_csv(lines, identifiers)
    if out is None:
        typer.echo(text, nl=False)
    else:
        out.write_text(text, encoding="utf-8")
        typer.echo(f"wrote {len(lines)} flag row(s) to {out}", err=True)


@audit_app.command("figures")
def figures(start: Start, end: End,
            out: Annotated[Path, typer.Option(help="directory for results.csv, notifications.csv, "
                                                   "audit_events.csv and summary.json")],
            database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """The rows behind each summary figure of [start, end), so every number can be recounted by hand."""
    from sqlalchemy.exc import SQLAlchemyError

    from service.db.summary import audit_rows, load_facts

    low, high = _range(start, end)
    db, policy, _ = _store(database_url, data_dir)
    try:
        with db.session() as session:
            facts = load_facts(session=session, start=low, end=high, policy=policy)
            audit = audit_rows(session=session, start=low, end=high)
    except SQLAlchemyError as exc:
        raise _failed_read(exc) from exc
    finally:
        db.dispose()
    out.mkdir(parents=True, exist_ok=True)
    tables = figures_tables(facts, audit, start=low, end=high)
    tables["flags.csv"] = export_csv(summarise(facts, start=low, end=high).lines)
    tables["summary.json"] = orjson.dumps(summary_json(summarise(facts, start=low, end=high)),
                                          option=orjson.OPT_INDENT_2).decode() + "\n"
    for name, text in tables.items():
        (out / name).write_text(text, encoding="utf-8")
    typer.echo(f"wrote {', '.join(sorted(tables))} to {out}. {CAUTION}", err=True)


@audit_app.command("summary")
def summary(start: Start, end: End, database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """The summary of [start, end) as JSON (with its caution)."""
    from sqlalchemy.exc import SQLAlchemyError

    from service.db.summary import load_facts

    low, high = _range(start, end)
    db, policy, _ = _store(database_url, data_dir)
    try:
        with db.session() as session:
            s = summarise(load_facts(session=session, start=low, end=high, policy=policy), start=low, end=high)
    except SQLAlchemyError as exc:
        raise _failed_read(exc) from exc
    finally:
        db.dispose()
    typer.echo(orjson.dumps(summary_json(s), option=orjson.OPT_INDENT_2).decode())
