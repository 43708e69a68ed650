"""FastAPI wiring: who is calling (from ``Authorization: Bearer …``) and whether their scopes suffice.

    install_auth(app, Authenticator(settings.auth, db=ctx.db, clock=ctx.clock))
    @router.get("/Flag", dependencies=[Depends(require("Flag", "s"))])

Refusals are :class:`AuthFailure`; the handler that :func:`install_auth` registers answers them with an
OperationOutcome and a ``WWW-Authenticate`` challenge. Nothing here logs a token; refusals are logged
with their reason and, once known, the client id.
"""

from __future__ import annotations

import logging
import re
import threading
import time
from collections.abc import Awaitable, Callable
from datetime import datetime, timedelta
from typing import Annotated

import httpx
from fastapi import Depends, FastAPI, Request
from fastapi.responses import Response
from sqlalchemy.exc import SQLAlchemyError

from service.api.fhir_io import outcome_response
from service.auth.failures import AuthFailure, forbidden, no_credentials, token_invalid
from service.auth.jwt import JwtVerifier
from service.auth.principal import Principal
from service.auth.scopes import INTERACTIONS, Grant, needed_scope
from service.auth.settings import AuthSettings, check_startable, running_under_pytest
from service.auth.tokens import TOKEN_PREFIX, record_use, verify_minted
from service.clock import Clock
from service.db.engine import Database
from service.errors import Issue

__all__ = [
    "AuthFailure",
    "Authenticator",
    "CallerDep",
    "OnRefused",
    "Principal",
    "auth_outcome_response",
    "authenticated",
    "entry_allowed",
    "entry_interactions",
    "update_refusal",
    "install_auth",
    "require",
]

log = logging.getLogger("lytestream.auth")

_B64TOKEN = re.compile(r"^[A-Za-z0-9\-._~+/]+=*$")  # RFC 6750 §2.1 b64token
_MAX_TOKEN_CHARS = 8192
_USE_RESOLUTION = timedelta(minutes=1)  # last_used_at is written at most this often per token
_EVERYTHING = (Grant("*", frozenset(INTERACTIONS)),)


class Authenticator:
    """Checks bearer tokens per :class:`AuthSettings`. One per process; safe across threads.

    Building one with ``disabled`` outside a pytest run raises :class:`AuthConfigError`, which is
    what keeps a deployed service from starting without access control.
    """

    def __init__(self, settings: AuthSettings, *, db: Database, clock: Clock,
                 http: httpx.Client | None = None, monotonic: Callable[[], float] = time.monotonic) -> None:
        check_startable(settings, testing=running_under_pytest())
        self.settings = settings
        self._db = db
        self._clock = clock
        self._own_http: httpx.Client | None = None
        self._jwt: JwtVerifier | None = None
        if settings.mode in ("jwt", "both") and not settings.disabled:
            if http is None:
                http = self._own_http = httpx.Client(follow_redirects=False)
            self._jwt = JwtVerifier(settings, client=http, monotonic=monotonic)
        self._used: dict[int, datetime] = {}
        self._used_lock = threading.Lock()
        if settings.disabled:
            log.warning("ACCESS CONTROL DISABLED (test run): every request is let through")

    def authenticate(self, authorization: str | None) -> Principal:
        """The caller named by an ``Authorization`` header value; :class:`AuthFailure` otherwise."""
        if self.settings.disabled:
            return Principal(client_id="auth-disabled", grants=_EVERYTHING, kind="disabled", admin=True)
        token = _bearer(authorization)
        if token.startswith(TOKEN_PREFIX):
            if self.settings.mode == "jwt":
                raise token_invalid("tokens minted by this service are not accepted here")
            return self._minted(token)
        if self._jwt is None:
            raise token_invalid("only tokens minted by this service are accepted here")
        return self._jwt.verify(token, now=self._clock.now())

    def close(self) -> None:
        if self._own_http is not None:
            self._own_http.close()

    def _minted(self, token: str) -> Principal:
        now = self._clock.now()
        with self._db.session() as session:
            principal = verify_minted(session, token=token, now=now, touch=False)
        if principal is None:
            raise token_invalid("the token is not known, or has been revoked")
        if principal.token_id is not None and self._use_due(principal.token_id, now):
            try:
                with self._db.session(write=True) as session:
                    record_use(session, token_id=principal.token_id, now=now)
            except SQLAlchemyError as exc:  # bookkeeping only: never refuse a valid caller over it
                log.warning("could not record token use for client %s: %s", principal.client_id,
                            type(exc).__name__)
        return principal

    def _use_due(self, token_id: int, now: datetime) -> bool:
        with self._used_lock:
            last = self._used.get(token_id)
            if last is not None and now - last < _USE_RESOLUTION:
                return False
            self._used[token_id] = now
            return True


def _bearer(authorization: str | None) -> str:
    if not authorization or not authorization.strip():
        raise no_credentials()
    scheme, _, value = authorization.strip().partition(" ")
    if scheme.lower() != "bearer":
        # RFC 6750 §3.1: an unsupported scheme is "no authentication information": challenge without error.
        raise no_credentials()
    token = value.strip()
    if not token:
        raise token_invalid("the bearer token is empty")
    if len(token) > _MAX_TOKEN_CHARS or not _B64TOKEN.match(token):
        raise token_invalid("the bearer token is malformed")
    return token


def _authenticator(request: Request) -> Authenticator:
    auth = getattr(request.app.state, "authenticator", None)
    if not isinstance(auth, Authenticator):
        # Fail closed: a route that asks for a check must never run unchecked because wiring is missing.
        raise RuntimeError("access control is not installed on this app (call install_auth)")
    return auth


def _resolve(request: Request) -> Principal:
    principal = _authenticator(request).authenticate(request.headers.get("authorization"))
    request.state.principal = principal
    return principal


def authenticated() -> Callable[[Request], Principal]:
    """A dependency that only authenticates: for ``POST [base]`` Bundles, checked entry by entry."""

    def dependency(request: Request) -> Principal:
        return _resolve(request)

    return dependency


def require(resource_type: str, interaction: str) -> Callable[[Request], Principal]:
    """A dependency that authenticates and demands ``interaction`` on ``resource_type``.

    ``interaction`` is one of ``c r u d s``, or several of them (``"cu"``), all of which are needed.
    """
    letters = frozenset(interaction)
    if not letters or not letters <= frozenset(INTERACTIONS):
        raise ValueError(f"interaction must be letters of {INTERACTIONS!r}, not {interaction!r}")
    scope = needed_scope(resource_type, letters)

    def dependency(request: Request) -> Principal:
        principal = _resolve(request)
        if not all(principal.allows(resource_type, i) for i in letters):
            raise forbidden(scope)
        return principal

    return dependency


CallerDep = Annotated[Principal, Depends(authenticated())]


def entry_interactions(resource_type: str, method: str, url: str | None = None) -> frozenset[str] | None:
    """What a Bundle entry's request needs (SMART App Launch 2.x, "Scopes for requesting clinical data").

    POST → c (``…/_search`` → s); PUT → u, and c too when conditional (``Type?…``), because a conditional
    update may create; PATCH → u; DELETE → d; GET/HEAD on an instance or its history → r, on a type
    (search, type history) → s, and with no url both, since we cannot tell. None: unknown method.
    """
    verb = method.upper()
    path, _, query = (url or "").partition("?")
    after = _after_type(path, resource_type)
    if verb == "POST":
        return frozenset("s") if after is not None and after[-1:] == ["_search"] else frozenset("c")
    if verb == "PUT":
        return frozenset("cu") if query else frozenset("u")
    if verb == "PATCH":
        return frozenset("u")
    if verb == "DELETE":
        return frozenset("d")
    if verb in ("GET", "HEAD"):
        if url is None or after is None:
            return frozenset("rs")
        instance = bool(after) and not after[0].startswith("_")  # Type/id[/_history[/vid]], not Type/_history
        return frozenset("r") if instance else frozenset("s")
    return None


def _after_type(path: str, resource_type: str) -> list[str] | None:
    """The path segments after the last ``resource_type`` segment (relative or absolute url), or None."""
    segments = [s for s in path.split("/") if s]
    for i in range(len(segments) - 1, -1, -1):
        if segments[i] == resource_type:
            return segments[i + 1:]
    return None


def entry_allowed(principal: Principal, resource_type: str, method: str, *,
                  url: str | None = None) -> Issue | None:
    """None if ``principal`` may carry out this Bundle entry; else the Issue to report for it (403)."""
    needed = entry_interactions(resource_type, method, url)
    if needed is None:
        return Issue("not-supported", f"method {method.upper()!r} is not supported in a Bundle entry",
                     status=405)
    if all(principal.allows(resource_type, i) for i in needed):
        return None
    scope = needed_scope(resource_type, needed)
    return Issue("forbidden", f"the token's scopes do not cover this entry; it needs {scope}", status=403)


def update_refusal(principal: Principal, resource_type: str) -> Issue | None:
    """None if ``principal`` may change held resources of this type; else the Issue for a create that would.

    A POST keyed on a business identifier that is already held becomes a new version of that resource (a
    correction, or ``entered-in-error`` withdrawing it): that is an update, whatever the HTTP method, so a
    create-only token must not do it. Whether a create would change something is known only when it is
    stored, so the ingestor reports this Issue then (an identical resend changes nothing and stays a 200).
    """
    if principal.allows(resource_type, "u"):
        return None
    scope = needed_scope(resource_type, frozenset("cu"))
    return Issue("forbidden", f"this create would change a {resource_type} already held (a new version, or a "
                 f"result that replaces another), which the token's scopes do not cover; it needs {scope}",
                 status=403)


def auth_outcome_response(exc: AuthFailure, *, realm: str = "lytestream") -> Response:
    """The FHIR answer to a refusal: OperationOutcome plus the RFC 6750 challenge."""
    response = outcome_response([exc.issue], exc.status)
    challenge = exc.www_authenticate(realm)
    if challenge is not None:
        response.headers["WWW-Authenticate"] = challenge
    if exc.status == 503:
        response.headers["Retry-After"] = "30"
    return response


OnRefused = Callable[[Request, AuthFailure], Awaitable[None]]


def install_auth(app: FastAPI, authenticator: Authenticator, *, on_refused: OnRefused | None = None) -> None:
    """Attach ``authenticator`` to ``app`` and answer :class:`AuthFailure` as FHIR.

    ``on_refused`` records each refusal (the service audits and logs them, within limits); without it a
    refusal is logged here. A failure to record never changes the answer.
    """
    app.state.authenticator = authenticator
    realm = authenticator.settings.realm

    async def _refused(request: Request, exc: Exception) -> Response:
        if not isinstance(exc, AuthFailure):  # registered for AuthFailure only; keep the type checker honest
            raise exc
        if on_refused is None:
            principal = getattr(request.state, "principal", None)
            who = principal.client_id if isinstance(principal, Principal) else "-"
            log.warning("auth refused: status=%s error=%s client=%s reason=%s", exc.status, exc.error or "-", who,
                        exc.description)
        else:
            try:
                await on_refused(request, exc)
            except Exception as failure:  # the refusal stands whatever became of its record
                log.error("could not record an auth refusal: %s", type(failure).__name__)
        return auth_outcome_response(exc, realm=realm)

    app.add_exception_handler(AuthFailure, _refused)
