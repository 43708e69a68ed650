"""Access-control settings, shaped to nest in the service's one settings object as ``auth``.

This module reads no environment itself; the main ``Settings`` does, and hands this model over.
"""

from __future__ import annotations

import sys
from typing import Literal
from urllib.parse import urlsplit

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = [
    "ASYMMETRIC_ALGORITHMS",
    "AuthConfigError",
    "AuthSettings",
    "check_startable",
    "running_under_pytest",
]

# Signature algorithms whose verification key is public. HS* are absent on purpose: with a JWKS the
# "secret" would be a public key, and `none` is no signature at all.
ASYMMETRIC_ALGORITHMS = frozenset(
    {"RS256", "RS384", "RS512", "PS256", "PS384", "PS512", "ES256", "ES384", "ES512"}
)


class AuthConfigError(RuntimeError):
    """The access-control settings cannot be used; the service must not start with them."""


class AuthSettings(BaseModel):
    """How bearer tokens are checked.

    ``mode``: ``minted`` accepts only tokens from ``lytestream token create``; ``jwt`` only JWT access
    tokens from the hospital's authorisation server; ``both`` either (told apart by the ``lyt_`` prefix).

    ``disabled`` turns every check off and lets any request through with every grant. It exists for
    tests of other features; :func:`check_startable` refuses it outside a test run, and the
    authenticator calls that check when it is built, so a deployed service will not start with it.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    mode: Literal["minted", "jwt", "both"] = Field(
        default="minted", description="which bearer tokens count: minted (lytestream token create), jwt (the "
                                      "hospital's authorisation server) or both")
    disabled: bool = Field(default=False, description="TESTS ONLY: no checks at all; refused elsewhere")
    realm: str = Field(default="lytestream", pattern=r"^[A-Za-z0-9._ -]{1,64}$",
                       description="the realm named in WWW-Authenticate challenges")
    issuer: str | None = Field(default=None, description="the authorisation server's `iss`, exactly")
    audience: str | None = Field(default=None, description="our `aud`, usually the public FHIR base URL")
    jwks_url: str | None = Field(default=None, description="the authorisation server's jwks_uri (https)")
    algorithms: tuple[str, ...] = Field(default=("RS256", "ES256"), min_length=1,
                                        description="JWT signature algorithms accepted (asymmetric only)")
    leeway_seconds: int = Field(default=30, ge=0, le=300,
                                description="clock skew allowed on exp, nbf and iat (a token issued further "
                                            "ahead than this is refused)")
    jwks_ttl_seconds: float = Field(default=600.0, gt=0, description="how long fetched keys are trusted")
    jwks_min_refetch_seconds: float = Field(
        default=30.0, ge=0, description="an unknown kid refetches the JWKS at most this often"
    )
    jwks_timeout_seconds: float = Field(default=5.0, gt=0, description="one JWKS fetch, at most")
    token_endpoint: str | None = Field(
        default=None, description="the authorisation server's token endpoint, announced by SMART discovery "
                                  "(/.well-known/smart-configuration) and the CapabilityStatement; needed in jwt "
                                  "and both modes")
    authorization_endpoint: str | None = Field(
        default=None, description="its authorize endpoint, announced beside it when set (backend services, "
                                  "which use client_credentials, need none)")
    require_at_jwt_typ: bool = Field(
        default=True, description="RFC 9068: the JWT header `typ` must be at+jwt (or application/at+jwt)"
    )

    @field_validator("algorithms")
    @classmethod
    def _asymmetric_only(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        bad = [a for a in value if a not in ASYMMETRIC_ALGORITHMS]
        if bad:
            raise ValueError(f"algorithms {bad} refused: only {sorted(ASYMMETRIC_ALGORITHMS)} may be allowed "
                             "(never none, never HS* against a public key set)")
        return tuple(dict.fromkeys(value))

    @field_validator("jwks_url", "token_endpoint", "authorization_endpoint")
    @classmethod
    def _https(cls, value: str | None) -> str | None:
        if value is None:
            return None
        parts = urlsplit(value)
        local = parts.hostname in ("localhost", "127.0.0.1", "::1")
        if parts.scheme != "https" and not (parts.scheme == "http" and local):
            raise ValueError("the authorisation server's URLs must be https (plain http only to localhost)")
        return value

    @model_validator(mode="after")
    def _jwt_needs_its_settings(self) -> AuthSettings:
        if self.mode in ("jwt", "both") and not self.disabled:
            missing = [n for n in ("issuer", "audience", "jwks_url", "token_endpoint") if not getattr(self, n)]
            if missing:
                raise ValueError(f"mode {self.mode!r} needs {', '.join(missing)}")
        return self


def running_under_pytest() -> bool:
    """True inside a pytest run: the only place ``disabled`` is allowed."""
    return "pytest" in sys.modules


def check_startable(settings: AuthSettings, *, testing: bool) -> None:
    """Refuse settings a deployed service must not run with."""
    if settings.disabled and not testing:
        raise AuthConfigError("auth.disabled is for tests only; refusing to start without access control")
