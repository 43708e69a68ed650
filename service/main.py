"""The FastAPI application: routers, FHIR error handling, and the process-wide context."""

from __future__ import annotations

import logging
import os
import random
import secrets
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from datetime import timedelta
from pathlib import Path
from urllib.parse import urlsplit
from zoneinfo import ZoneInfo

import httpx
from fastapi import Depends, FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from sqlalchemy.exc import DBAPIError
from starlette.exceptions import HTTPException
from starlette.routing import Mount
from starlette.staticfiles import StaticFiles

from service.api.context import AppContext
from service.api.fhir_io import outcome_response
from service.api.intake import BodyAborted, BodyIntake
from service.api.last_resort import LastResort, internal_error
from service.api.refusals import RefusalAudit, RefusalLimiter
from service.api.request_log import RequestLog, note_route
from service.api.routes import audit, backtest, board, conformance, flags, ingest, meta, read, subscriptions, summary
from service.api.wire import FhirWire
from service.arrivals import ArrivalReview
from service.auth.deps import Authenticator, install_auth
from service.board.session import derive_key
from service.clock import Clock, SystemClock
from service.config import Settings
from service.db.engine import Database, StoreBusy
from service.dispatch import Dispatcher
from service.errors import Issue, NotFound, RequestRejected
from service.evaluation import Evaluator
from service.ingest import Ingestor
from service.jobs import start_scheduler
from service.logsafe import describe, safe_traceback
from service.policy import load_policy

__all__ = ["app_from_environment", "build_context", "create_app"]

log = logging.getLogger("lytestream")
BOARD_STATIC = Path(__file__).resolve().parent / "board" / "static"


def build_context(settings: Settings, *, clock: Clock | None = None, migrate: bool = True,
                  http: httpx.Client | None = None) -> AppContext:
    """Everything a process needs, from its settings: the policy is validated here, at start-up."""
    policy = load_policy(settings.policy_file, profile=settings.policy_profile)
    db = Database(settings.resolved_database_url)
    if migrate:
        db.create_schema()
    clock = clock or SystemClock()
    lab_zone = ZoneInfo(settings.lab_timezone) if settings.lab_timezone else None
    evaluator = Evaluator(policy=policy, lookback=timedelta(hours=settings.lookback_hours), lab_zone=lab_zone)
    ingestor = Ingestor(db=db, settings=settings, insulin=policy.insulin.codes_matcher(), clock=clock,
                        on_change=evaluator,
                        on_stored=ArrivalReview(policy=policy, lookback=timedelta(hours=settings.lookback_hours),
                                                lab_zone=lab_zone),
                        future_tolerance=timedelta(minutes=policy.timing.future_tolerance_minutes))
    dispatcher = Dispatcher(db=db, settings=settings, clock=clock, client=http or httpx.Client(),
                            rng=random.Random())
    refusals = RefusalLimiter(per_key=settings.refusal_audit_per_client, overall=settings.refusal_audit_overall)
    return AppContext(settings=settings, db=db, clock=clock, ingestor=ingestor, policy=policy,
                      evaluator=evaluator, dispatcher=dispatcher, refusals=refusals)


def app_from_environment() -> FastAPI:
    """The uvicorn factory for `lytestream serve`: settings from LYTESTREAM_*; the CLI migrated first."""
    return create_app(context=build_context(Settings(), migrate=False))


def _board_key(settings: Settings) -> bytes:
    """The key that signs board sessions: from the setting; else one kept in the data directory, so every
    worker and restart on this machine shares it; else (no writable data directory) one for this process."""
    secret = settings.board_session_secret
    if secret is not None:
        return derive_key(secret.get_secret_value())
    path = settings.data_dir / "board-session.key"
    try:
        settings.data_dir.mkdir(parents=True, exist_ok=True)
        try:
            with os.fdopen(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600), "w") as f:
                f.write(secrets.token_hex(32))
        except FileExistsError:
            pass  # made by another worker or an earlier start
        return derive_key(path.read_text().strip())
    except OSError as exc:
        log.warning("board sessions: no key file in the data directory (%s); sessions last this process only; "
                    "set LYTESTREAM_BOARD_SESSION_SECRET", type(exc).__name__)
        return derive_key(None)


def create_app(settings: Settings | None = None, *, context: AppContext | None = None) -> FastAPI:
    ctx = context or build_context(settings or Settings())
    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        scheduler = start_scheduler(ctx) if ctx.settings.scheduler else None
        try:
            yield
        finally:
            if scheduler is not None:
                scheduler.shutdown(wait=True)
            authenticator.close()

    docs = ctx.settings.api_docs  # off by default: the OpenAPI description answers without a token
    app = FastAPI(title="lytestream", version="0.1.0", docs_url="/docs" if docs else None, redoc_url=None,
                  openapi_url="/openapi.json" if docs else None, lifespan=lifespan,
                  dependencies=[Depends(note_route)])
    app.state.ctx = ctx
    app.add_middleware(BodyIntake, max_body_bytes=ctx.settings.max_body_bytes,
                       timeout_s=ctx.settings.body_timeout_seconds, slots=ctx.settings.max_concurrent_bodies)
    # Outermost: the trailing-slash base and a 406 come before anything reads the request.
    app.add_middleware(FhirWire, base_path=urlsplit(ctx.settings.base_url).path or "/fhir")
    authenticator = Authenticator(ctx.settings.auth, db=ctx.db, clock=ctx.clock)
    install_auth(app, authenticator, on_refused=RefusalAudit(db=ctx.db, clock=ctx.clock,
                                                             base_url=ctx.settings.base_url, limiter=ctx.refusals))
    app.include_router(meta.router)
    app.include_router(conformance.router)  # before read.router, like summary
    app.include_router(summary.router)  # before read.router: /fhir/Flag/$summary is not a Flag id
    app.include_router(backtest.router)  # before read and ingest: /fhir/$backtest is no resource type
    app.include_router(ingest.router)
    app.include_router(flags.router)
    app.include_router(audit.router)
    app.include_router(subscriptions.router)
    app.include_router(read.router)
    # The board: its pages, its own static files (vendored, so no CDN is ever asked), its session key.
    app.state.board_key = _board_key(ctx.settings)
    app.include_router(board.router)
    app.mount("/board/static", StaticFiles(directory=BOARD_STATIC), name="board-static")
    board.install_board(app)

    @app.exception_handler(RequestRejected)
    async def _rejected(_: Request, exc: RequestRejected) -> Response:
        log.info("request rejected: status=%s issues=%d", exc.status, len(exc.issues))
        response = outcome_response(exc.issues, exc.status)
        if exc.status in (408, 413):
            # The rest of the body may still be on its way: do not read it as the next request.
            response.headers["connection"] = "close"
        return response

    @app.exception_handler(BodyAborted)
    async def _aborted(_: Request, exc: BodyAborted) -> Response:
        # An expected event on a network, not a fault: one line, no traceback, no content.
        log.warning("request body aborted by the client after %d bytes; nothing stored", exc.received)
        return outcome_response([Issue("incomplete", "the request body was not complete")], 400)

    @app.exception_handler(NotFound)
    async def _not_found(_: Request, exc: NotFound) -> Response:
        return outcome_response([Issue("not-found", str(exc), status=404)], 404)

    @app.exception_handler(HTTPException)
    async def _http(request: Request, exc: HTTPException) -> Response:
        code = {404: "not-found", 405: "not-supported"}.get(exc.status_code, "processing")
        detail = str(exc.detail)
        if exc.status_code == 404:
            # A path no route serves: say where FHIR is, so a misconfigured client can correct its base.
            detail = (f"{request.method} {request.url.path}: {detail.lower()}; the FHIR base of this server is "
                      f"{ctx.settings.base_url} (its CapabilityStatement at {ctx.settings.base_url}/metadata)")
        return outcome_response([Issue(code, detail)], exc.status_code)

    @app.exception_handler(RequestValidationError)
    async def _invalid(_: Request, exc: RequestValidationError) -> Response:
        return outcome_response([Issue("invalid", "request parameters are not valid")], 400)

    @app.exception_handler(StoreBusy)
    async def _busy(_: Request, exc: StoreBusy) -> Response:
        # Lost a database race on every attempt: nothing stored, and sending it again will work.
        log.warning("store busy: %s", exc)
        response = outcome_response([Issue("transient", "the database was busy with concurrent requests; "
                                           "nothing from this request was stored; send it again",
                                           severity="error")], 503)
        response.headers["Retry-After"] = "1"
        return response

    @app.exception_handler(DBAPIError)
    async def _database(_: Request, exc: DBAPIError) -> Response:
        # Handled here, not re-raised to the server (as Starlette's catch-all would): its text would carry
        # the statement's patient data. The log gets the frames and the SQLSTATE only.
        log.error("database error %s\n%s", describe(exc), safe_traceback(exc))
        return internal_error()

    # Outermost of our middleware: what nothing above handled answers a 500 OperationOutcome there, and is
    # not raised on to the server (which would drop the kept-alive connection).
    app.add_middleware(LastResort)
    # Outside even that: the request log sees the status the client got, 500s included.
    app.add_middleware(RequestLog, mounts=tuple(r.path for r in app.routes if isinstance(r, Mount)))
    return app
