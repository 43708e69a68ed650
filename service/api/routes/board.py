"""The board's pages: login, the live list of active Flags, a Flag's trajectory, acknowledgement.

Thin routes: the store is read by service.db.board, pages are built by service.board.* and the
templates. Access is the FHIR API's: a login proves a bearer token (minted or the hospital's JWT)
with ``system/Flag.rs``; acknowledging needs ``system/Flag.u`` as ``$acknowledge`` does; the chart
of results needs ``system/Observation.rs``. Every page that shows patient data is audited as the
API's reads are.
"""

from __future__ import annotations

import hashlib
import logging
import threading
from collections import OrderedDict
from datetime import timedelta
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import quote, urlsplit
from zoneinfo import ZoneInfo

import orjson
from fastapi import APIRouter, Depends, Form, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.templating import Jinja2Templates
from sqlalchemy import select

from service.acknowledging import NOTE_MAX, acknowledge
from service.api.access_audit import audit_patient_access
from service.api.context import AppContext, ContextDep
from service.api.refusals import RefusalAudit
from service.api.requester import request_id
from service.auth.failures import AuthFailure, forbidden
from service.auth.scopes import needed_scope
from service.auth.tables import ApiToken
from service.board.session import COOKIE_NAME, BoardSession, SessionInvalid, new_session, open_cookie, seal_cookie
from service.board.trajectory import trajectory
from service.board.views import board_rows, local_time
from service.db.board import active_flag_facts, flag_facts
from service.db.reads import read_references
from service.db.timeline import load_timeline
from service.domain.artefacts import suspects
from service.errors import NotFound, RequestRejected
from service.fhir.audit_render import Requester
from service.fhir.render import CAUTION

__all__ = ["router"]

log = logging.getLogger("lytestream.board")
router = APIRouter(include_in_schema=False)
_TEMPLATES = Jinja2Templates(directory=str(Path(__file__).resolve().parents[2] / "board" / "templates"))
_MAX_NAME = 80


class _NotLoggedIn(Exception):
    pass


def _zone(ctx: AppContext) -> ZoneInfo | None:
    return ZoneInfo(ctx.settings.lab_timezone) if ctx.settings.lab_timezone else None


def _session(request: Request, ctx: ContextDep) -> BoardSession:
    try:
        session = open_cookie(request.cookies.get(COOKIE_NAME), request.app.state.board_key, ctx.clock.now())
    except SessionInvalid as exc:
        raise _NotLoggedIn(str(exc)) from exc
    if session.principal.kind == "minted" and session.principal.token_id is not None:
        # A revoked token ends the board sessions it opened at their next request.
        tokens = ApiToken.__table__  # type: ignore[attr-defined]
        with ctx.db.session() as s:
            live = s.execute(select(tokens.c.id).where(tokens.c.id == session.principal.token_id,
                                                       tokens.c.revoked_at.is_(None))).first()
        if live is None:
            raise _NotLoggedIn("the token this board session was opened with has been revoked")
    return session


SessionDep = Annotated[BoardSession, Depends(_session)]


def _requester(request: Request, session: BoardSession) -> Requester:
    return Requester(client=session.principal.client_id, address=request.client.host if request.client else None,
                     request_id=request_id(request), principal=session.principal)


# Our scripts and styles only, from this origin: nothing is fetched from the internet, and an injected
# script could neither run nor send data away.
SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
                               "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",  # patient data: never kept by a shared or back-button cache
}


def _page(request: Request, name: str, context: dict[str, Any], status: int = 200) -> HTMLResponse:
    ctx: AppContext = request.app.state.ctx
    response = _TEMPLATES.TemplateResponse(request, name, {"caution": CAUTION, "refresh_ms":
                                                           int(ctx.settings.board_refresh_seconds * 1000), **context},
                                           status_code=status)
    response.headers.update(SECURITY_HEADERS)
    return response


@router.get("/board/login")
async def login_form(request: Request, next: str = "/board") -> HTMLResponse:
    return _page(request, "login.html", {"next": _local_path(next), "error": None})


@router.post("/board/login")
async def login(request: Request, ctx: ContextDep, token: Annotated[str, Form()] = "",
                name: Annotated[str, Form()] = "", next: Annotated[str, Form()] = "/board") -> Response:
    person = " ".join(name.split())
    target = _local_path(next)
    if not person or len(person) > _MAX_NAME or not person.isprintable():
        return _page(request, "login.html", {"next": target, "error":
                     f"Give your name as the team knows you (1–{_MAX_NAME} characters): it is shown on "
                     "every acknowledgement you make."}, 400)
    try:
        # As the API's check: a store lookup, or a JWT's keys fetched from the issuer; off the event loop.
        principal = await run_in_threadpool(request.app.state.authenticator.authenticate, f"Bearer {token.strip()}")
        request.state.principal = principal
        if not (principal.allows("Flag", "r") and principal.allows("Flag", "s")):
            raise forbidden(needed_scope("Flag", "rs"))
    except AuthFailure as exc:
        await RefusalAudit(db=ctx.db, clock=ctx.clock, base_url=ctx.settings.base_url, limiter=ctx.refusals)(
            request, exc)
        message = (f"This token may not read Flags: the board needs {needed_scope('Flag', 'rs')}."
                   if exc.status == 403 else f"The token was not accepted: {exc.description}.")
        return _page(request, "login.html", {"next": target, "error": message}, exc.status)
    session = new_session(principal, person, ctx.clock.now(), ctx.settings.board_session_hours)
    log.info("board login: client=%s request=%s", principal.client_id, request_id(request))
    response = RedirectResponse(target, status_code=303)
    response.set_cookie(COOKIE_NAME, seal_cookie(session, request.app.state.board_key), path="/board",
                        max_age=max(int((session.expires - ctx.clock.now()).total_seconds()), 0), httponly=True,
                        samesite="strict",
                        secure=urlsplit(ctx.settings.base_url).scheme == "https")
    return response


@router.post("/board/logout")
async def logout(request: Request, session: SessionDep, csrf: Annotated[str, Form()] = "") -> Response:
    _check_csrf(request, session, csrf)
    response = RedirectResponse("/board/login", status_code=303)
    response.delete_cookie(COOKIE_NAME, path="/board")
    return response


@router.get("/board")
async def board(request: Request, ctx: ContextDep, session: SessionDep, notice: str | None = None) -> HTMLResponse:
    rows, digest = await run_in_threadpool(_rows_seen, ctx, request, session, "GET /board")
    return _page(request, "board.html", {"rows": rows, "digest": digest, "session": session,
                                         "notice": _notice(notice), "now": local_time(ctx.clock.now(), _zone(ctx)),
                                         "can_ack": session.principal.allows("Flag", "u")})


@router.get("/board/rows")
async def board_fragment(request: Request, ctx: ContextDep, session: SessionDep) -> Response:
    """The table body alone, for the open board to swap in; 204 when nothing changed since ``digest``."""
    rows, digest = await run_in_threadpool(_rows_seen, ctx, request, session, "GET /board/rows")
    if request.query_params.get("digest") == digest:
        return Response(status_code=204, headers={"X-Board-Digest": digest})
    response = _page(request, "rows.html", {"rows": rows, "session": session,
                                            "can_ack": session.principal.allows("Flag", "u")})
    response.headers["X-Board-Digest"] = digest
    response.headers["X-Board-Count"] = str(len(rows))
    return response


@router.get("/board/flags/{flag_id}")
async def flag_page(request: Request, flag_id: str, ctx: ContextDep, session: SessionDep,
                    notice: str | None = None) -> HTMLResponse:
    who = _requester(request, session)

    def build() -> dict[str, Any] | None:
        with ctx.db.session() as s:
            found = flag_facts(session=s, flag_id=flag_id)
            if found is None:
                return None
            facts, patient_key, evidence, status = found
            flag_rows = read_references(session=s, references=[f"Flag/{flag_id}"])
            chart = None
            result_rows: list[bytes] = []
            if session.principal.allows("Observation", "r"):
                window_end = ctx.clock.now()
                timeline = load_timeline(session=s, patient_key=patient_key, end=window_end,
                                         lookback=timedelta(hours=ctx.settings.lookback_hours))
                chart = trajectory(timeline, ctx.policy, evidence, suspects(timeline.results, ctx.policy))
                chart["zone"] = ctx.settings.lab_timezone or "UTC"
                result_rows = read_references(session=s, references=[r.reference for r in timeline.results])
        audit_patient_access(ctx, who, flag_rows + result_rows, subtype="read", query=f"GET /board/flags/{flag_id}")
        row = board_rows([facts], ctx.clock.now(), _zone(ctx))[0]
        return {"row": row, "status": status, "evidence": evidence, "chart": chart,
                "chart_json": _script_json(chart) if chart is not None else None}

    built = await run_in_threadpool(build)
    if built is None:
        return _page(request, "missing.html", {"flag_id": flag_id, "session": session}, 404)
    return _page(request, "flag.html", {**built, "session": session, "notice": _notice(notice),
                                        "can_ack": session.principal.allows("Flag", "u"),
                                        "needs_results": needed_scope("Observation", "rs")})


@router.post("/board/flags/{flag_id}/acknowledge")
async def acknowledge_from_board(request: Request, flag_id: str, ctx: ContextDep, session: SessionDep,
                                 csrf: Annotated[str, Form()] = "", note: Annotated[str, Form()] = "",
                                 back: Annotated[str, Form()] = "/board") -> Response:
    _check_csrf(request, session, csrf)
    if not session.principal.allows("Flag", "u"):
        exc = forbidden(needed_scope("Flag", "u"))
        await RefusalAudit(db=ctx.db, clock=ctx.clock, base_url=ctx.settings.base_url, limiter=ctx.refusals)(
            request, exc)
        return _page(request, "refused.html", {"message": "Acknowledging needs "
                                               f"{needed_scope('Flag', 'u')}; this login has read access only.",
                     "session": session}, 403)
    text = note.strip()[:NOTE_MAX] or None
    who = _requester(request, session)

    def run() -> str:
        try:
            done = acknowledge(ctx, flag_id=flag_id, who=who, person=session.person, note=text)
        except NotFound:
            return "missing"
        except RequestRejected as exc:
            if exc.status == 409:
                return "closed"
            raise
        return "already" if done.already else "acked"

    outcome = await run_in_threadpool(run)
    target = _local_path(back)
    sep = "&" if "?" in target else "?"
    return RedirectResponse(f"{target}{sep}notice={outcome}:{quote(flag_id, safe='')}", status_code=303)


def _script_json(data: Any) -> str:
    """JSON safe inside a <script> element: text from the feed (a lab's remark) cannot end the element."""
    return orjson.dumps(data).decode().replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


def _notice(notice: str | None) -> str | None:
    kind, _, flag_id = (notice or "").partition(":")
    return {"acked": f"Acknowledged Flag {flag_id}.",
            "already": f"Flag {flag_id} was already acknowledged at this version; nothing changed.",
            "closed": f"Flag {flag_id} is no longer active; there is nothing to acknowledge.",
            "missing": f"Flag {flag_id} is not held here."}.get(kind)


def _rows_seen(ctx: AppContext, request: Request, session: BoardSession, query: str) -> tuple[list[Any], str]:
    """The board's rows and their digest; Flags this session has not been shown yet are audited."""
    with ctx.db.session() as s:
        facts = active_flag_facts(session=s)
        # ("", 0) stands for the empty board: a query that returned nothing, audited once per session too.
        shown = [(f.id, f.version_id) for f in facts] or [("", 0)]
        new = _AUDITED.unseen(_session_key(request), shown)
        served = read_references(session=s, references=[f"Flag/{fid}/_history/{v}" for fid, v in new if fid])
    if new:
        audit_patient_access(ctx, _requester(request, session), served, subtype="search-type", query=query)
    rows = board_rows(facts, ctx.clock.now(), _zone(ctx))
    digest = hashlib.sha256(orjson.dumps([(r.id, r.version_id, r.ack, r.escalations, r.raised_ago)
                                          for r in rows])).hexdigest()[:16]
    return rows, digest


class _SeenVersions:
    """Flag versions already audited per board session in this process, so a board refreshing every
    few seconds records who saw what once, not once per refresh. Bounded; a restart audits again."""

    def __init__(self, sessions: int = 1000) -> None:
        self._seen: OrderedDict[str, set[tuple[str, int]]] = OrderedDict()
        self._sessions = sessions
        self._lock = threading.Lock()

    def unseen(self, key: str, versions: list[tuple[str, int]]) -> list[tuple[str, int]]:
        with self._lock:
            seen = self._seen.setdefault(key, set())
            self._seen.move_to_end(key)
            while len(self._seen) > self._sessions:
                self._seen.popitem(last=False)
            new = [v for v in versions if v not in seen]
            seen.update(new)
            return new


_AUDITED = _SeenVersions()


def _session_key(request: Request) -> str:
    return hashlib.sha256(request.cookies.get(COOKIE_NAME, "").encode()).hexdigest()


def _check_csrf(request: Request, session: BoardSession, given: str) -> None:
    # SameSite=Strict keeps the cookie off cross-site posts; the per-session token covers older browsers.
    origin = request.headers.get("origin")
    if (origin is not None and origin != "null" and urlsplit(origin).netloc != request.url.netloc) \
            or not session.csrf_ok(given):
        raise _CsrfRefused()


class _CsrfRefused(Exception):
    pass


def _local_path(target: str) -> str:
    """Only a path on this board is a place to go back to (no open redirect)."""
    parts = urlsplit(target)
    if parts.scheme or parts.netloc or not parts.path.startswith("/board") or "\\" in target:
        return "/board"
    return target


def install_board(app: Any) -> None:
    """Exception handlers of the board: not logged in → the login page; a bad CSRF token → 403."""

    async def _to_login(request: Request, exc: Exception) -> Response:
        if request.url.path == "/board/rows":  # the page's script sends the user to log in
            return Response(status_code=401, headers={"X-Board-Login": "/board/login"})
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return RedirectResponse(f"/board/login?next={quote(_local_path(target), safe='')}", status_code=303)

    async def _csrf(request: Request, exc: Exception) -> Response:
        log.warning("board form refused: bad or missing CSRF token, request=%s", request_id(request))
        return _page(request, "refused.html", {"message": "The form had expired or did not come from this board. "
                                               "Reload the page and try again.", "session": None}, 403)

    app.add_exception_handler(_NotLoggedIn, _to_login)
    app.add_exception_handler(_CsrfRefused, _csrf)
