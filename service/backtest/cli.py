"""`lytestream backtest`: what a candidate policy would have raised over stored history (or an NDJSON
feed), side by side with the baseline. Read-only on the store."""

from __future__ import annotations

import tempfile
from datetime import datetime, timedelta
from pathlib import Path
from typing import Annotated, Any

import typer
from sqlalchemy import func, select

__all__ = ["backtest_command"]


def _fail(message: str) -> typer.Exit:
    typer.echo(message, err=True)
    return typer.Exit(code=2)


def backtest_command(
    policy: Annotated[Path, typer.Option(help="candidate policy TOML", exists=True, dir_okay=False)],
    baseline: Annotated[str, typer.Option(help="baseline policy TOML, or 'current' for the policy in force")]
    = "current",
    start: Annotated[str | None, typer.Option(help="range start, included: 2026-03-01 or 2026-03-01T06:00:00Z "
                                              "(default: the first stored arrival)")] = None,
    end: Annotated[str | None, typer.Option(help="range end, excluded (default: just after the last arrival)")]
    = None,
    out: Annotated[Path, typer.Option(help="directory for the CSV tables, summary.json and report.html")]
    = Path("backtest-report"),
    feed: Annotated[Path | None, typer.Option(help="FHIR NDJSON feed to backtest instead of the store",
                                              exists=True, dir_okay=False)] = None,
    html: Annotated[bool, typer.Option(help="also write report.html with plots (one file, works offline)")]
    = True,
    workers: Annotated[int, typer.Option(min=1, max=64, help="worker processes (one per core)")] = 1,
    with_identifiers: Annotated[bool, typer.Option(
        "--with-identifiers", help="add the names the feeds sent for each patient to flags.csv and gained_lost.csv "
                                   "(from the store: recorded as a disclosure AuditEvent per patient)")] = False,
    tick_minutes: Annotated[float, typer.Option(min=1, help="recheck interval while insulin is recorded")] = 15,
    database_url: Annotated[str | None, typer.Option(help="SQLAlchemy URL (default: SQLite in the data dir)")]
    = None,
    data_dir: Annotated[Path | None, typer.Option(help="where the embedded SQLite database lives")] = None,
) -> None:
    """Re-evaluate history under the candidate and the baseline policy; write CSV, JSON and HTML."""
    from service.backtest.output import write_all
    from service.backtest.run import Backtest, run_backtest
    from service.cli import _settings
    from service.policy import PolicyError, load_policy
    from service.summary import parse_instant

    settings = _settings(database_url, data_dir)
    try:
        current = load_policy(settings.policy_file, profile=settings.policy_profile)
        base = current if baseline == "current" else load_policy(Path(baseline))
        cand = load_policy(policy)
    except PolicyError as exc:
        raise _fail(f"policy refused: {exc}") from exc
    with tempfile.TemporaryDirectory() as tmp:
        url = settings.resolved_database_url
        if feed is not None:
            from service.backtest.feed import store_feed

            url, read, stored = store_feed(feed, Path(tmp))
            typer.echo(f"feed: {read} resources read, {stored} stored", err=True)
        try:
            low = parse_instant(start, "--start") if start else None
            high = parse_instant(end, "--end") if end else None
        except ValueError as exc:
            raise _fail(str(exc)) from exc
        low, high = _span(url, low, high)
        if high <= low:
            raise _fail("--end must be after --start (the range is [start, end))")
        job = Backtest(database_url=url, baseline=base, candidate=cand, start=low, end=high,
                       lookback=timedelta(hours=settings.lookback_hours), tick=timedelta(minutes=tick_minutes),
                       workers=workers)
        comparison = run_backtest(job)
        identifiers = _identifiers(url, comparison, disclose=feed is None, settings=settings) \
            if with_identifiers else None
    written = write_all(comparison, out, identifiers)
    if html:
        from service.backtest.report import write_report

        written.append(write_report(comparison, out))
    b, c = comparison.baseline.total, comparison.candidate.total
    typer.echo(f"{comparison.results_stored} results, {comparison.patient_days} patient-days: baseline "
               f"{b.flags} Flags, candidate {c.flags} Flags "
               f"({sum(d.change == 'gained' for d in comparison.differences)} gained, "
               f"{sum(d.change == 'lost' for d in comparison.differences)} lost)")
    for path in written:
        typer.echo(f"wrote {path}", err=True)


def _identifiers(url: str, comparison: Any, *, disclose: bool, settings: Any) -> dict[str, list[str]]:
    """The names the feeds sent for each patient the tables name. Read from the store they are a
    disclosure, recorded (one AuditEvent per patient) before anything is written; read from a feed the
    analyst supplied, they only repeat that file."""
    import uuid
    from datetime import UTC

    from service.backtest.output import patients_named
    from service.db.audit import record_audit
    from service.db.engine import Database
    from service.db.patients import patient_identifiers
    from service.fhir.audit_render import AuditFacts, Requester

    db = Database(url)
    try:
        keys = patients_named(comparison)
        with db.session() as session:
            names = patient_identifiers(session=session, patient_keys=keys)
        if disclose and names:
            who = Requester(client="command-line backtest", address=None, request_id=str(uuid.uuid4()))
            now = datetime.now(UTC)
            events = []
            for key in keys:
                first = (names.get(key) or [""])[0]
                if not first:
                    continue
                system, _, value = first.partition("|")
                patient = ({"identifier": {"system": system, "value": value} if system else {"value": value}}
                           if "|" in first else {"reference": first})
                events.append((AuditFacts(subtype="disclose", recorded=now, requester=who, patient=patient,
                                          details={"export": "backtest CSV with patient identifiers"}), key))
            with db.session(write=True) as session:
                record_audit(session=session, events=events, base_url=settings.base_url)
    finally:
        db.dispose()
    return names


def _span(url: str, low: datetime | None, high: datetime | None) -> tuple[datetime, datetime]:
    """The range asked for, its open ends filled from the store's first and last arrival."""
    if low is not None and high is not None:
        return low, high
    from service.db.engine import Database
    from service.db.tables import ObservationRecord

    obs = ObservationRecord.__table__  # type: ignore[attr-defined]
    db = Database(url)
    try:
        with db.session() as session:
            first, last = session.execute(select(func.min(obs.c.last_updated),
                                                 func.max(obs.c.last_updated))).one()
    finally:
        db.dispose()
    if first is None:
        raise _fail("no stored results to backtest")
    return low or first, high or last + timedelta(microseconds=1)
