"""JWT access tokens from the hospital's authorisation server, checked locally (RFC 9068 style).

The signing keys come from the server's JWKS, fetched with the ``httpx.Client`` we are given and kept
for a TTL. A token whose ``kid`` we do not know triggers one refetch (key rotation), but no more often
than ``jwks_min_refetch_seconds``, so a stream of made-up kids cannot turn into a stream of fetches.

The algorithm comes from an allow-list of asymmetric algorithms and must agree with the key's type,
so neither ``alg: none`` nor an HS256 token "signed" with a public key can get through. Time claims are
checked here against the caller's ``now`` (the service clock), not inside the JWT library.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, TypeGuard

import httpx
import jwt as pyjwt
from jwt import PyJWK

from service.auth.failures import keys_unavailable, token_expired, token_invalid
from service.auth.principal import Principal
from service.auth.scopes import parse_scopes
from service.auth.settings import AuthSettings

__all__ = ["JwksCache", "JwtVerifier", "KeysUnavailable"]

log = logging.getLogger("lytestream.auth")

_AT_JWT = ("at+jwt", "application/at+jwt")
_EC_CURVES = {"ES256": "P-256", "ES384": "P-384", "ES512": "P-521"}


class KeysUnavailable(RuntimeError):
    """No usable JWKS: never fetched successfully, or too stale to trust."""


@dataclass(frozen=True, slots=True)
class _Key:
    kid: str | None
    jwk: dict[str, Any]
    key: PyJWK


class JwksCache:
    """The authorisation server's public signing keys, fetched lazily and refreshed on a TTL.

    On a failed refresh the last good keys stay in use for up to one more TTL, so a short outage of
    the authorisation server does not lock every client out; after that requests get 503.
    """

    def __init__(self, *, client: httpx.Client, url: str, ttl_seconds: float, min_refetch_seconds: float,
                 timeout_seconds: float = 5.0, monotonic: Callable[[], float] = time.monotonic) -> None:
        self._client = client
        self._url = url
        self._ttl = ttl_seconds
        self._min_refetch = min_refetch_seconds
        self._timeout = timeout_seconds
        self._monotonic = monotonic
        self._lock = threading.Lock()
        self._keys: tuple[_Key, ...] | None = None
        self._loaded_at = 0.0
        self._attempted_at: float | None = None

    def find(self, kid: str | None) -> _Key | None:
        """The key for ``kid`` (None: the only key), refetching once if it is unknown."""
        with self._lock:
            now = self._monotonic()
            fetched = False
            if self._keys is None or now - self._loaded_at >= self._ttl:
                fetched = self._refresh_if_allowed(now, force=self._keys is None)
            if self._keys is None or now - self._loaded_at >= 2 * self._ttl:
                raise KeysUnavailable("no current JWKS")
            key = _pick(self._keys, kid)
            if key is None and not fetched and self._refresh_if_allowed(now, force=False):
                key = _pick(self._keys, kid)
            return key

    def _refresh_if_allowed(self, now: float, *, force: bool) -> bool:
        """Fetch unless we tried within the minimum interval; True if a fetch was attempted."""
        if not force and self._attempted_at is not None and now - self._attempted_at < self._min_refetch:
            return False
        self._attempted_at = now
        try:
            keys = self._fetch()
        except (httpx.HTTPError, ValueError) as exc:
            log.warning("JWKS fetch failed: %s", type(exc).__name__)
            return True
        self._keys, self._loaded_at = keys, now
        log.info("JWKS loaded: %d signing keys", len(keys))
        return True

    def _fetch(self) -> tuple[_Key, ...]:
        response = self._client.get(self._url, timeout=self._timeout, headers={"Accept": "application/json"})
        response.raise_for_status()
        body = response.json()
        raw = body.get("keys") if isinstance(body, dict) else None
        if not isinstance(raw, list):
            raise ValueError("JWKS has no keys array")
        keys = []
        for item in raw:
            key = _usable(item)
            if key is not None:
                keys.append(key)
        if not keys:
            raise ValueError("JWKS holds no usable signing key")
        return tuple(keys)


def _usable(item: object) -> _Key | None:
    """A public signing key, or None: encryption keys and symmetric keys are never signing keys here."""
    if not isinstance(item, dict) or item.get("kty") not in ("RSA", "EC") or item.get("use", "sig") != "sig":
        return None
    if any(private in item for private in ("d", "p", "q")):
        return None  # a JWKS that publishes private keys is broken; do not use it
    try:
        kid = item.get("kid")
        return _Key(kid=kid if isinstance(kid, str) else None, jwk=item, key=PyJWK(item))
    except (pyjwt.PyJWKError, pyjwt.InvalidKeyError, ValueError, TypeError):
        return None


def _pick(keys: tuple[_Key, ...], kid: str | None) -> _Key | None:
    if kid is None:
        return keys[0] if len(keys) == 1 else None
    return next((k for k in keys if k.kid == kid), None)


class JwtVerifier:
    """Turns a JWT access token into a :class:`Principal`, or raises :class:`AuthFailure`."""

    def __init__(self, settings: AuthSettings, *, client: httpx.Client,
                 monotonic: Callable[[], float] = time.monotonic) -> None:
        if not (settings.issuer and settings.audience and settings.jwks_url):
            raise ValueError("JWT verification needs issuer, audience and jwks_url")
        self._settings = settings
        self._issuer = settings.issuer
        self._audience = settings.audience
        self.keys = JwksCache(client=client, url=settings.jwks_url, ttl_seconds=settings.jwks_ttl_seconds,
                              min_refetch_seconds=settings.jwks_min_refetch_seconds,
                              timeout_seconds=settings.jwks_timeout_seconds, monotonic=monotonic)

    def verify(self, token: str, *, now: datetime) -> Principal:
        header = _header(token)
        alg = header.get("alg")
        if not isinstance(alg, str) or alg not in self._settings.algorithms:
            raise token_invalid("the token's signing algorithm is not accepted")
        if self._settings.require_at_jwt_typ and str(header.get("typ", "")).lower() not in _AT_JWT:
            raise token_invalid("the token is not a JWT access token (typ must be at+jwt)")
        kid = header.get("kid")
        if kid is not None and not isinstance(kid, str):
            raise token_invalid("the token's key id is malformed")
        try:
            key = self.keys.find(kid)
        except KeysUnavailable as exc:
            raise keys_unavailable() from exc
        if key is None:
            raise token_invalid("the token was signed with a key the authorisation server does not publish")
        _key_fits(key, alg)
        claims = _signed_claims(token, key, alg)
        self._check_claims(claims, now)
        return _principal(claims)

    def _check_claims(self, claims: dict[str, Any], now: datetime) -> None:
        if claims.get("iss") != self._issuer:
            raise token_invalid("the token was not issued by the trusted authorisation server")
        aud = claims.get("aud")
        audiences = [aud] if isinstance(aud, str) else aud if isinstance(aud, list) else []
        if self._audience not in audiences:
            raise token_invalid("the token is not meant for this service (aud)")
        at, leeway = now.timestamp(), self._settings.leeway_seconds
        exp = claims.get("exp")
        if not _is_number(exp):
            raise token_invalid("the token has no valid exp claim")
        if at > exp + leeway:
            raise token_expired()
        nbf = claims.get("nbf")
        if nbf is not None and (not _is_number(nbf) or at + leeway < nbf):
            raise token_invalid("the token is not valid yet (nbf)")
        # RFC 9068 §2.2 makes iat required; it is checked when present, so a token "issued" tomorrow (a
        # forged or broken one, or a badly wrong clock) is refused, with the same small skew as exp and nbf.
        iat = claims.get("iat")
        if iat is not None and not _is_number(iat):
            raise token_invalid("the token has no valid iat claim")
        if iat is not None and iat > at + leeway:
            raise token_invalid("the token was issued in the future (iat)")


def _header(token: str) -> dict[str, Any]:
    try:
        header = pyjwt.get_unverified_header(token)
    except pyjwt.InvalidTokenError as exc:
        raise token_invalid("the token is not a well-formed JWT") from exc
    return header


def _key_fits(key: _Key, alg: str) -> None:
    """The header's algorithm must be one the key was made for (no cross-type or cross-curve use)."""
    declared = key.jwk.get("alg")
    kty = key.jwk.get("kty")
    fits = (kty == "RSA" and alg[:2] in ("RS", "PS")) or (
        kty == "EC" and key.jwk.get("crv") == _EC_CURVES.get(alg))
    if not fits or (declared is not None and declared != alg):
        raise token_invalid("the token's algorithm does not match its signing key")


def _signed_claims(token: str, key: _Key, alg: str) -> dict[str, Any]:
    try:
        claims = pyjwt.decode(
            token, key=key.key.key, algorithms=[alg],
            # Claims are checked by us against the service clock; the library checks the signature only.
            options={"verify_signature": True, "verify_exp": False, "verify_nbf": False, "verify_iat": False,
                     "verify_aud": False, "verify_iss": False, "require": []},
        )
    except pyjwt.InvalidSignatureError as exc:
        raise token_invalid("the token's signature does not verify") from exc
    except pyjwt.InvalidTokenError as exc:
        raise token_invalid("the token could not be verified") from exc
    if not isinstance(claims, dict):
        raise token_invalid("the token's claims are not a JSON object")
    return claims


def _principal(claims: dict[str, Any]) -> Principal:
    scope = claims.get("scope")
    scp = claims.get("scp")
    if isinstance(scope, str):
        scope_string = scope
    elif isinstance(scp, list) and all(isinstance(s, str) for s in scp):
        scope_string = " ".join(scp)
    else:
        raise token_invalid("the token carries no scope claim")
    sub = claims.get("sub") if isinstance(claims.get("sub"), str) else None
    candidates = (claims.get("client_id"), claims.get("azp"), sub)
    client = next((c for c in candidates if isinstance(c, str) and c), None)
    if client is None:
        raise token_invalid("the token names no client (client_id or sub)")
    parsed = parse_scopes(scope_string)
    exp = claims.get("exp")  # checked to be a number by _check_claims
    return Principal(client_id=client, grants=parsed.grants, kind="jwt", subject=sub if sub != client else None,
                     admin=parsed.admin,
                     expires=datetime.fromtimestamp(exp, UTC) if _is_number(exp) else None)


def _is_number(value: object) -> TypeGuard[int | float]:
    return isinstance(value, int | float) and not isinstance(value, bool)
