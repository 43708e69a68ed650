"""Board sessions: a signed cookie naming the caller a bearer token proved, never the token itself.

Logging in to the board checks a token exactly as the FHIR API does (minted or the hospital's JWT)
and then issues a cookie holding what that check found: the client, its grants, the person at the
screen, a CSRF secret and an expiry, signed with HMAC-SHA256. Nothing is kept on the server, so
any replica that shares the signing key can serve the session. Pure: the caller supplies the key
and the time.

The raw token never leaves the login request: a stolen cookie is worth one board session of
``session_hours``, not a FHIR credential.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
from dataclasses import dataclass
from datetime import datetime, timedelta

import orjson

from service.auth.principal import Principal
from service.auth.scopes import Grant

__all__ = ["COOKIE_NAME", "BoardSession", "SessionInvalid", "derive_key", "new_session", "open_cookie", "seal_cookie"]

COOKIE_NAME = "lytestream_board"
_VERSION = 1


class SessionInvalid(Exception):
    """The cookie is missing, altered, expired or of another version: log in again."""


@dataclass(frozen=True, slots=True)
class BoardSession:
    principal: Principal
    person: str  # the name the acknowledger gives at login (shown on acknowledgements)
    csrf: str  # a per-session secret every state-changing form must echo
    expires: datetime

    def csrf_ok(self, given: str | None) -> bool:
        return given is not None and hmac.compare_digest(given.encode(), self.csrf.encode())


def new_session(principal: Principal, person: str, now: datetime, hours: float) -> BoardSession:
    """A session of ``hours``, or less: never longer than the token that opened it (a JWT's exp)."""
    expires = now + timedelta(hours=hours)
    if principal.expires is not None:
        expires = min(expires, principal.expires)
    return BoardSession(principal=principal, person=person, csrf=secrets.token_urlsafe(24), expires=expires)


def seal_cookie(session: BoardSession, key: bytes) -> str:
    p = session.principal
    body = orjson.dumps({
        "v": _VERSION, "c": p.client_id, "k": p.kind, "t": p.token_id, "s": p.subject, "a": p.admin,
        "g": [[g.resource_type, "".join(sorted(g.interactions))] for g in p.grants],
        "p": session.person, "x": session.csrf, "e": int(session.expires.timestamp()),
    })
    payload = base64.urlsafe_b64encode(body).rstrip(b"=")
    return f"{payload.decode()}.{_sign(payload, key)}"


def open_cookie(value: str | None, key: bytes, now: datetime) -> BoardSession:
    """The session a cookie carries; :class:`SessionInvalid` unless it is intact and unexpired."""
    if not value or value.count(".") != 1 or len(value) > 8192:
        raise SessionInvalid("no board session")
    payload, signature = value.split(".")
    if not hmac.compare_digest(_sign(payload.encode(), key), signature):
        raise SessionInvalid("the board session cookie is not one this service signed")
    try:
        data = orjson.loads(base64.urlsafe_b64decode(payload + "=" * (-len(payload) % 4)))
        if data["v"] != _VERSION:
            raise SessionInvalid("the board session is of an older version")
        expires = datetime.fromtimestamp(int(data["e"]), tz=now.tzinfo)
        principal = Principal(client_id=str(data["c"]), kind=data["k"], token_id=data["t"], subject=data["s"],
                              admin=bool(data["a"]),
                              grants=tuple(Grant(str(t), frozenset(str(i))) for t, i in data["g"]))
        session = BoardSession(principal=principal, person=str(data["p"]), csrf=str(data["x"]), expires=expires)
    except (ValueError, KeyError, TypeError) as exc:  # signed by us yet unreadable: treat as absent
        raise SessionInvalid("the board session cookie is unreadable") from exc
    if session.expires <= now:
        raise SessionInvalid("the board session has expired")
    return session


def _sign(payload: bytes, key: bytes) -> str:
    return base64.urlsafe_b64encode(hmac.new(key, payload, hashlib.sha256).digest()).rstrip(b"=").decode()


def derive_key(secret: str | None) -> bytes:
    """The signing key: from the configured secret, or a random one for this process alone."""
    if secret:
        return hashlib.sha256(b"lytestream-board-session\x00" + secret.encode()).digest()
    return secrets.token_bytes(32)
