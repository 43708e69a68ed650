"""The `lytestream` command: serve, migrate, replay a feed."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer
from rich.console import Console

from service.audit_cli import audit_app
from service.auth.cli import token_app
from service.backtest.cli import backtest_command
from service.config import Settings

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

DatabaseUrl = Annotated[str | None, typer.Option(help="SQLAlchemy URL (default: SQLite in the data dir)")]
DataDir = Annotated[Path | None, typer.Option(help="where the embedded SQLite database lives")]


def _settings(database_url: str | None = None, data_dir: Path | None = None) -> Settings:
    overrides: dict[str, Any] = {}
    if database_url:
        overrides["database_url"] = database_url
    if data_dir:
        overrides["data_dir"] = data_dir
    return Settings(**overrides)


@app.command()
def serve(
    host: Annotated[str, typer.Option(help="interface to listen on")] = "127.0.0.1",
    port: Annotated[int, typer.Option(help="TCP port")] = 8080,
    database_url: DatabaseUrl = None,
    data_dir: DataDir = None,
    workers: Annotated[int, typer.Option(min=1, max=64, help="worker processes (one per core)")] = 1,
) -> None:
    """Run the FHIR service (migrates the schema first)."""
    import os

    import uvicorn

    from service.db.engine import Database

    settings = _settings(database_url, data_dir)
    if "base_url" not in settings.model_fields_set:
        settings = settings.model_copy(update={"base_url": f"http://{host}:{port}/fhir"})
    # Migrate once here, before any worker starts; the workers read the same settings from the environment.
    db = Database(settings.resolved_database_url)
    db.create_schema()
    db.dispose()
    os.environ["LYTESTREAM_DATABASE_URL"] = settings.resolved_database_url
    os.environ["LYTESTREAM_DATA_DIR"] = str(settings.data_dir)
    os.environ["LYTESTREAM_BASE_URL"] = settings.base_url
    console.print(f"lytestream on http://{host}:{port}/fhir — database {_safe_url(settings)}, {workers} worker(s)")
    console.print("[dim]Decision support only: thresholds are site policy; defer to local protocols.[/dim]")
    from service.logsafe import log_config

    # log_config: exception text withheld on every handler, whoever logs (no patient data in logs).
    uvicorn.run("service.main:app_from_environment", factory=True, host=host, port=port, workers=workers,
                log_level="warning", access_log=False, log_config=log_config())


@app.command()
def demo(
    file: Annotated[Path | None, typer.Option(help="FHIR NDJSON feed (default: the invented ward)")] = None,
    data_dir: DataDir = None,
    end: Annotated[str | None, typer.Option(help="scenario end, e.g. 2026-03-03T00:00:00Z")] = "2026-03-03T00:00:00Z",
) -> None:
    """Replay the invented ward's 48 h feed on an embedded SQLite store and print the flags raised."""
    import tempfile

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


@db_app.command("upgrade")
def db_upgrade(database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """Bring the schema to the newest migration."""
    from service.db.engine import Database

    settings = _settings(database_url, data_dir)
    db = Database(settings.resolved_database_url)
    db.create_schema()
    db.dispose()
    console.print(f"schema up to date at {_safe_url(settings)}")


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
