"""The `lytestream` command: serve, migrate, replay a feed."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any, Literal

import typer
from rich.console import Console

from service.audit_cli import audit_app
from service.auth.cli import token_app
from service.backtest.cli import backtest_command
from service.config import Settings
from service.ops.startup import database_fault, policy_fault

app = typer.Typer(help="lytestream: FHIR lab results in, safety Flags out. Decision support only.",
                  no_args_is_help=True, add_completion=False)
db_app = typer.Typer(help="Database schema.", no_args_is_help=True)
app.add_typer(db_app, name="db")
policy_app = typer.Typer(help="Site policy (thresholds).", no_args_is_help=True)
app.add_typer(policy_app, name="policy")
app.add_typer(token_app, name="token")
app.add_typer(audit_app, name="audit")
app.command("backtest")(backtest_command)
console = Console(stderr=True)

# Addresses that mean "every interface": serving on them needs the public base URL spelled out.
_ALL_INTERFACES = frozenset({"0.0.0.0", "::", "[::]"})

DatabaseUrl = Annotated[str | None, typer.Option(help="SQLAlchemy URL (default: SQLite in the data dir)")]
DataDir = Annotated[Path | None, typer.Option(help="where the embedded SQLite database lives")]


def _settings(database_url: str | None = None, data_dir: Path | None = None) -> Settings:
    overrides: dict[str, Any] = {}
    if database_url:
        overrides["database_url"] = database_url
    if data_dir:
        overrides["data_dir"] = data_dir
    return Settings(**overrides)


LogLevel = Literal["debug", "info", "warning", "error"]


@app.command()
def serve(
    host: Annotated[str, typer.Option(help="interface to listen on")] = "127.0.0.1",
    port: Annotated[int, typer.Option(help="TCP port")] = 8080,
    database_url: DatabaseUrl = None,
    data_dir: DataDir = None,
    workers: Annotated[int, typer.Option(min=1, max=64, help="worker processes (one per core)")] = 1,
    log_level: Annotated[LogLevel | None, typer.Option(help="log level (default: LYTESTREAM_LOG_LEVEL, info)")]
    = None,
) -> None:
    """Run the FHIR service (checks the policy and migrates the schema first)."""
    import os

    import uvicorn

    from service.auth.settings import check_startable, running_under_pytest
    from service.policy import PolicyError, load_policy

    settings = _settings(database_url, data_dir)
    if log_level is not None:
        settings = settings.model_copy(update={"log_level": log_level})
    if "base_url" not in settings.model_fields_set:
        if host in _ALL_INTERFACES:
            # Behind a proxy or in a container the bind address says nothing of how clients reach us, and
            # a guessed base URL would go into every Location header and Bundle link.
            typer.echo(f"refusing to listen on {host} without LYTESTREAM_BASE_URL: set it to the public FHIR "
                       "base URL clients use, e.g. https://alerts.example.org/fhir", err=True)
            raise typer.Exit(code=2)
        settings = settings.model_copy(update={"base_url": f"http://{host}:{port}/fhir"})
    try:  # here, once, before the banner: a worker that fails on it would only say so in its log
        load_policy(settings.policy_file, profile=settings.policy_profile)
    except PolicyError as exc:
        raise policy_fault(exc, settings.policy_file, settings.policy_profile) from exc
    check_startable(settings.auth, testing=running_under_pytest())
    # Migrate once here, before any worker starts; the workers read the same settings from the environment.
    _migrate(settings)
    os.environ["LYTESTREAM_DATABASE_URL"] = settings.resolved_database_url
    os.environ["LYTESTREAM_DATA_DIR"] = str(settings.data_dir)
    os.environ["LYTESTREAM_BASE_URL"] = settings.base_url
    os.environ["LYTESTREAM_LOG_LEVEL"] = settings.log_level
    if workers > 1 and settings.metrics != "off":
        _share_metrics(settings.data_dir / "metrics")
    console.print(f"lytestream on http://{host}:{port}/fhir — database {_safe_url(settings)}, {workers} worker(s)")
    console.print("[dim]Decision support only: thresholds are site policy; defer to local protocols.[/dim]")
    from service.logsafe import log_config

    # log_config: JSON lines, exception text withheld on every handler (no patient data in logs); uvicorn's
    # access log stays off: service.api.request_log writes a line per request without paths or queries.
    uvicorn.run("service.main:app_from_environment", factory=True, host=host, port=port, workers=workers,
                log_level=settings.log_level, access_log=False, log_config=log_config(settings.log_level))


def _share_metrics(directory: Path) -> None:
    """prometheus_client multiprocess mode for the workers: each writes its counters there and a scrape of
    any worker sums them. Emptied first: the counters of a previous run are not this run's."""
    import os

    directory.mkdir(parents=True, exist_ok=True)
    for stale in directory.glob("*.db"):
        stale.unlink()
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = str(directory)  # read by prometheus_client in each worker
    os.environ["LYTESTREAM_METRICS_MULTIPROCESS_DIR"] = str(directory)


def _migrate(settings: Settings) -> None:
    from sqlalchemy.exc import DBAPIError

    from service.db.engine import Database

    db = Database(settings.resolved_database_url)
    try:
        db.create_schema()
    except DBAPIError as exc:
        raise database_fault(exc, settings.resolved_database_url) from exc
    finally:
        db.dispose()


@app.command()
def demo(
    file: Annotated[Path | None, typer.Option(help="FHIR NDJSON feed (default: the invented ward)")] = None,
    data_dir: DataDir = None,
    end: Annotated[str | None, typer.Option(help="scenario end, e.g. 2026-03-03T00:00:00Z")] = "2026-03-03T00:00:00Z",
    serve: Annotated[bool, typer.Option("--serve", help="then run the service on it and open the board: the "
                                                     "feed is moved in time so that its close is now")] = False,
    port: Annotated[int, typer.Option(help="TCP port for --serve")] = 8080,
) -> None:
    """Replay the invented ward's 48 h feed on an embedded SQLite store and print the flags raised."""
    import tempfile

    if serve:
        _serve_demo(file, data_dir, end or "2026-03-03T00:00:00Z", port)
        return

    from rich.table import Table

    from service.demo import DEFAULT_FEED, run_demo
    from service.fhir.normalise import parse_datetime
    from service.fhir.render import CAUTION

    feed = file or DEFAULT_FEED
    if not feed.exists():
        console.print(f"[red]no feed at {feed}[/red]")
        raise typer.Exit(code=2)
    with tempfile.TemporaryDirectory() as tmp:
        flags, sent, stored = run_demo(feed, data_dir or Path(tmp), parse_datetime(end) if end else None)
    table = Table(title=f"Flags raised by the demo ward ({sent} resources sent, {stored} stored)")
    for column in ("patient", "rule", "priority", "status", "since", "why"):
        table.add_column(column, overflow="fold")
    for f in flags:
        style = "bold red" if f.status == "active" and f.priority == "PH" else None
        table.add_row(f.patient, f.rule, f.priority, f.status, f.start, f.sentence, style=style)
    out = Console(width=160)
    out.print(table)
    out.print(f"[dim]{CAUTION}[/dim]")


def _serve_demo(file: Path | None, data_dir: Path | None, end: str, port: int) -> None:
    """`demo --serve`: the invented ward loaded as if it were happening now, the service on it, the board's
    address and a sign-in token printed. The data directory is kept when given, else removed at exit."""
    import os
    import sys
    import tempfile
    import webbrowser
    from datetime import UTC, datetime

    import uvicorn

    from service.demo import DEFAULT_FEED, prepare_live_demo
    from service.fhir.normalise import parse_datetime
    from service.fhir.render import CAUTION
    from service.main import create_app

    now = datetime.now(UTC).replace(second=0, microsecond=0)
    with tempfile.TemporaryDirectory() as tmp:
        where = data_dir or Path(tmp)
        stored, token = prepare_live_demo(file or DEFAULT_FEED, where, parse_datetime(end), now)
        settings = _settings(None, where).model_copy(update={"base_url": f"http://127.0.0.1:{port}/fhir"})
        url = f"http://127.0.0.1:{port}/board"
        console.print(f"The invented ward is loaded ({stored} resources), its close moved to now.")
        console.print(f"Board: {url} — sign in with any name and this token (client demo-board):")
        typer.echo(token)  # alone on standard output, like `token create`
        console.print(f"[dim]{CAUTION}[/dim]")
        if sys.stdout.isatty() and (os.environ.get("DISPLAY") or sys.platform == "darwin"):
            try:  # someone at a desktop: open it for them; elsewhere the address above is enough
                webbrowser.open(f"{url}/login")
            except webbrowser.Error:
                pass
        uvicorn.run(create_app(settings), host="127.0.0.1", port=port, log_level="warning", access_log=False)


@db_app.command("upgrade")
def db_upgrade(database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """Bring the schema to the newest migration."""
    settings = _settings(database_url, data_dir)
    _migrate(settings)
    console.print(f"schema up to date at {_safe_url(settings)}")


@db_app.command("backup")
def db_backup(file: Annotated[Path, typer.Argument(help="new file to write the backup to")],
              database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """Copy the SQLite store to FILE while the service runs (one consistent moment); PostgreSQL: pg_dump."""
    from service.backup import BackupError, backup_sqlite, pg_dump_hint, sqlite_path

    settings = _settings(database_url, data_dir)
    try:
        if sqlite_path(settings.resolved_database_url) is None:
            typer.echo("a PostgreSQL store is backed up with its own tools, e.g.\n  "
                       + pg_dump_hint(settings.resolved_database_url, file), err=True)
            raise typer.Exit(code=2)
        info = backup_sqlite(settings.resolved_database_url, file)
    except BackupError as exc:
        typer.echo(f"backup refused: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    typer.echo(f"backup written to {file}: migration {info.revision}, {info.rows} rows")


@db_app.command("restore")
def db_restore(file: Annotated[Path, typer.Argument(help="a backup made by `lytestream db backup`")],
               force: Annotated[bool, typer.Option(help="replace a store that holds data")] = False,
               database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """Replace the (stopped) SQLite store with FILE, then bring it to the newest migration."""
    from service.backup import BackupError, restore_sqlite, sqlite_path
    from service.db.engine import Database

    settings = _settings(database_url, data_dir)
    try:
        if sqlite_path(settings.resolved_database_url) is None:
            typer.echo("a PostgreSQL store is restored with its own tools: pg_restore --clean --dbname URL FILE",
                       err=True)
            raise typer.Exit(code=2)
        info = restore_sqlite(file, settings.resolved_database_url, force=force)
    except BackupError as exc:
        typer.echo(f"restore refused: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    db = Database(settings.resolved_database_url)
    db.create_schema()
    db.dispose()
    typer.echo(f"restored {file} (migration {info.revision}, {info.rows} rows) to {_safe_url(settings)}; "
               "schema up to date")


@db_app.command("purge")
def db_purge(days: Annotated[float | None, typer.Option(min=0.001, help="retention in days (default: "
                                                          "LYTESTREAM_RETENTION_DAYS)")] = None,
             database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """Delete raw requests and AuditEvents older than the retention period now (the scheduler does it hourly)."""
    from service.clock import SystemClock
    from service.db.engine import Database
    from service.retention import purge_expired

    settings = _settings(database_url, data_dir)
    keep = days if days is not None else settings.retention_days
    if keep is None:
        typer.echo("no retention period: pass --days or set LYTESTREAM_RETENTION_DAYS", err=True)
        raise typer.Exit(code=2)
    db = Database(settings.resolved_database_url)
    try:
        purged = purge_expired(db, days=keep, now=SystemClock().now(), base_url=settings.base_url)
    finally:
        db.dispose()
    typer.echo(f"purged {purged.received_requests} raw request(s) and {purged.audit_events} AuditEvent(s) "
               f"recorded before {purged.before.isoformat()}")


PolicyFile = Annotated[Path | None, typer.Argument(help="policy TOML (default: the built-in policy)")]
Profile = Annotated[str | None, typer.Option(help="profile to apply, e.g. paediatric")]


@policy_app.command("show")
def policy_show(file: PolicyFile = None, profile: Profile = None) -> None:
    """Print the resolved policy as JSON with its hash (what every Flag records)."""
    import orjson

    from service.policy import PolicyError, load_policy, policy_hash

    try:
        policy = load_policy(file, profile=profile)
    except PolicyError as exc:
        console.print(f"[red]policy refused:[/red] {exc}")
        raise typer.Exit(code=2) from exc
    body = {"hash": policy_hash(policy), "policy": policy.model_dump(mode="json")}
    typer.echo(orjson.dumps(body, option=orjson.OPT_INDENT_2).decode())


@policy_app.command("check")
def policy_check(file: Annotated[Path, typer.Argument(help="policy TOML to check", exists=True, dir_okay=False)],
                 profile: Profile = None) -> None:
    """Validate a policy file; exit 2 naming the first bad key."""
    from service.policy import PolicyError, load_policy, policy_hash

    try:
        policy = load_policy(file, profile=profile)
    except PolicyError as exc:
        typer.echo(f"policy refused: {exc}", err=True)
        raise typer.Exit(code=2) from exc
    typer.echo(f"policy ok: profile {policy.profile}, hash {policy_hash(policy)}")


@app.command()
def replay(
    file: Annotated[Path, typer.Argument(help="FHIR NDJSON: one resource per line", exists=True, dir_okay=False)],
    url: Annotated[str, typer.Option(help="FHIR base URL of the service")] = "http://127.0.0.1:8080/fhir",
    bundle_size: Annotated[int, typer.Option(min=1, max=1000, help="resources per transaction")] = 100,
    token: Annotated[str | None, typer.Option(envvar="LYTESTREAM_TOKEN", show_default=False,
                                              help="bearer token (scope system/Observation.cu …)")] = None,
) -> None:
    """Send a feed as idempotent transaction Bundles (conditional update by identifier)."""
    from service.replay import replay_file

    summary = replay_file(file, url, bundle_size=bundle_size, console=console, token=token)
    typer.echo(summary.headline())
    for line in [*summary.warnings[:20], *summary.errors[:20]]:
        typer.echo(line)
    if summary.refused:
        raise typer.Exit(code=1)


def _safe_url(settings: Settings) -> str:
    """The database URL without a password, for the console."""
    from sqlalchemy.engine import make_url

    return make_url(settings.resolved_database_url).render_as_string(hide_password=True)


def main() -> None:
    """The `lytestream` entry point: a start-up fault is one line on stderr and exit code 2, no traceback."""
    import sys

    from service.ops.startup import EXIT_CODE, startup_line

    try:
        app()
    except Exception as exc:
        line = startup_line(exc)
        if line is None:
            raise
        print(line, file=sys.stderr)
        sys.exit(EXIT_CODE)
