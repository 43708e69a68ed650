"""``lytestream token …``: mint, revoke and list the bearer tokens this service issues.

``create`` writes the token, and nothing else, on standard output, so ``TOKEN=$(lytestream token create …)``
works; every note goes to standard error. No command ever prints a token again after ``create``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer
from sqlalchemy.exc import SQLAlchemyError

from service.auth.scopes import ScopeError
from service.auth.tokens import TokenError, all_tokens, mint, revoke
from service.clock import SystemClock
from service.config import Settings
from service.db.engine import Database

__all__ = ["token_app"]

token_app = typer.Typer(help="Bearer tokens this service issues to its clients.", no_args_is_help=True)

DatabaseUrl = Annotated[str | None, typer.Option(help="SQLAlchemy URL (default: SQLite in the data dir)")]
DataDir = Annotated[Path | None, typer.Option(help="where the embedded SQLite database lives")]


def _database(database_url: str | None, data_dir: Path | None) -> Database:
    """The same settings and store the main command uses, with the schema brought up to date."""
    overrides: dict[str, Any] = {}
    if database_url:
        overrides["database_url"] = database_url
    if data_dir:
        overrides["data_dir"] = data_dir
    db = Database(Settings(**overrides).resolved_database_url)
    db.create_schema()
    return db


def _fail(message: str, code: int) -> typer.Exit:
    typer.echo(message, err=True)
    return typer.Exit(code=code)


@token_app.command("create")
def create(
    client: Annotated[str, typer.Option(help="who will hold the token, e.g. lab-interface-engine")],
    scope: Annotated[str, typer.Option(help='SMART system scopes, space-separated: "system/Observation.cu"')],
    database_url: DatabaseUrl = None,
    data_dir: DataDir = None,
) -> None:
    """Mint a token and print it once, alone, on standard output."""
    db = _database(database_url, data_dir)
    try:
        with db.session(write=True) as session:
            token = mint(session, client=client, scope=scope, now=SystemClock().now())
    except (TokenError, ScopeError) as exc:
        raise _fail(f"token refused: {exc}", 2) from exc
    except SQLAlchemyError as exc:
        raise _fail(f"token not stored ({type(exc).__name__}); is the schema up to date?", 1) from exc
    finally:
        db.dispose()
    typer.echo(f"token created for client {client}; it is shown only now: store it in the client's secrets",
               err=True)
    typer.echo(token)


@token_app.command("revoke")
def revoke_command(
    client: Annotated[str | None, typer.Option(help="revoke every active token of this client")] = None,
    token_id: Annotated[int | None, typer.Option("--id", help="revoke the token with this id")] = None,
    database_url: DatabaseUrl = None,
    data_dir: DataDir = None,
) -> None:
    """Revoke tokens: refused from the next request on."""
    if (client is None) == (token_id is None):
        raise _fail("give --client or --id (one of them)", 2)
    db = _database(database_url, data_dir)
    try:
        with db.session(write=True) as session:
            count = revoke(session, client=client, token_id=token_id, now=SystemClock().now())
    finally:
        db.dispose()
    if count == 0:
        raise _fail("no active token matched; nothing revoked", 1)
    typer.echo(f"revoked {count} token(s)", err=True)


@token_app.command("list")
def list_command(database_url: DatabaseUrl = None, data_dir: DataDir = None) -> None:
    """Every token with its client, scope and dates (the secrets are not stored, so never shown)."""
    db = _database(database_url, data_dir)
    try:
        with db.session() as session:
            rows = all_tokens(session)
    finally:
        db.dispose()
    typer.echo("id\tclient\tstatus\tcreated\tlast_used\tscope")
    for row in rows:
        status = "revoked" if row.revoked_at else "active"
        used = row.last_used_at.isoformat(timespec="seconds") if row.last_used_at else "-"
        created = row.created_at.isoformat(timespec="seconds")
        typer.echo(f"{row.id}\t{row.client}\t{status}\t{created}\t{used}\t{row.scope}")
