"""Bearer tokens minted by this service for its own clients (lab interface engines, dashboards).

A token is ``lyt_`` + 43 URL-safe characters (``secrets.token_urlsafe(32)``, 256 bits). Only its
sha256 is stored. Lookup is by that hash through a unique index; the index walk is not constant time,
but what it could leak is the hash of a 256-bit random value, which gives nothing towards a valid
token. The final comparison is still ``hmac.compare_digest``, so no code path compares secrets with
``==``.

DB helpers take the session first and never commit: the caller's unit of work does.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from datetime import datetime

from sqlmodel import Session, col, select

from service.auth.principal import Principal
from service.auth.scopes import parse_scopes, strict_scope_string
from service.auth.tables import ApiToken

__all__ = [
    "TOKEN_PREFIX",
    "TokenError",
    "active_tokens",
    "all_tokens",
    "hash_token",
    "looks_minted",
    "mint",
    "record_use",
    "revoke",
    "verify_minted",
]

TOKEN_PREFIX = "lyt_"
_SHAPE = re.compile(r"^lyt_[A-Za-z0-9_-]{43}$")
_CLIENT = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


class TokenError(ValueError):
    """A request to mint or revoke that cannot be carried out."""


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def looks_minted(token: str) -> bool:
    """Whether ``token`` has the shape of one of ours (says nothing about validity)."""
    return _SHAPE.match(token) is not None


def mint(session: Session, *, client: str, scope: str, now: datetime) -> str:
    """Store a new token for ``client`` and return it. The only time the secret exists in the clear."""
    _check_aware(now)
    if not _CLIENT.match(client):
        raise TokenError("client name must be 1-64 of A-Z a-z 0-9 . _ - and start with a letter or digit")
    stored = strict_scope_string(scope)  # a minted scope that would grant nothing is a typo: refuse it
    token = TOKEN_PREFIX + secrets.token_urlsafe(32)
    session.add(ApiToken(client=client, scope=stored, token_hash=hash_token(token), created_at=now))
    session.flush()
    return token


def revoke(session: Session, *, now: datetime, client: str | None = None, token_id: int | None = None) -> int:
    """Revoke every active token of ``client``, or the one with ``token_id``; the number revoked."""
    _check_aware(now)
    if (client is None) == (token_id is None):
        raise TokenError("revoke by client or by token id, exactly one of them")
    query = select(ApiToken).where(col(ApiToken.revoked_at).is_(None))
    query = query.where(ApiToken.client == client if client is not None else ApiToken.id == token_id)
    rows = list(session.exec(query))
    for row in rows:
        row.revoked_at = now
        session.add(row)
    session.flush()
    return len(rows)


def verify_minted(session: Session, *, token: str, now: datetime, touch: bool = True) -> Principal | None:
    """The caller holding ``token``, or None if it is not an active token of ours.

    ``touch`` records ``last_used_at``, which makes the unit of work a write; the request path passes
    False and calls :func:`record_use` separately so that reads stay reads.
    """
    _check_aware(now)
    if not looks_minted(token):
        return None
    digest = hash_token(token)
    row = session.exec(select(ApiToken).where(ApiToken.token_hash == digest)).first()
    if row is None or not hmac.compare_digest(row.token_hash, digest) or row.revoked_at is not None:
        return None
    if touch:
        row.last_used_at = now
        session.add(row)
    parsed = parse_scopes(row.scope)
    return Principal(client_id=row.client, grants=parsed.grants, kind="minted", token_id=row.id,
                     admin=parsed.admin)


def record_use(session: Session, *, token_id: int, now: datetime) -> None:
    """Note that a token was used at ``now`` (kept for audits and for finding tokens nobody uses)."""
    _check_aware(now)
    row = session.get(ApiToken, token_id)
    if row is not None:
        row.last_used_at = now
        session.add(row)


def active_tokens(session: Session, *, client: str) -> list[ApiToken]:
    query = select(ApiToken).where(ApiToken.client == client, col(ApiToken.revoked_at).is_(None))
    return list(session.exec(query.order_by(col(ApiToken.id))))


def all_tokens(session: Session) -> list[ApiToken]:
    return list(session.exec(select(ApiToken).order_by(col(ApiToken.id))))


def _check_aware(now: datetime) -> None:
    if now.tzinfo is None:
        raise ValueError("naive datetime refused: pass aware UTC")
