"""Why a request was refused, as RFC 6750 and FHIR both want to hear it."""

from __future__ import annotations

import re
from dataclasses import dataclass

from service.errors import Issue

__all__ = ["AuthFailure", "forbidden", "keys_unavailable", "no_credentials", "not_owner", "token_expired",
           "token_invalid"]

_UNSAFE = re.compile(r'[^\x20-\x21\x23-\x5b\x5d-\x7e]')  # RFC 6750 §3: error_description characters


@dataclass(eq=False)
class AuthFailure(Exception):
    """A refusal: 401 (no usable token), 403 (token lacks scope), or 503 (keys unreachable).

    ``error`` is the RFC 6750 code (None when the request carried no credentials, §3.1); ``issue_code``
    the FHIR issue type; ``scope`` the scope that would have been enough (403 only). The description
    is written by this package and never quotes the token or request data.
    """

    status: int
    issue_code: str
    description: str
    error: str | None = None
    scope: str | None = None

    def __post_init__(self) -> None:
        super().__init__(self.description)

    @property
    def issue(self) -> Issue:
        return Issue(self.issue_code, self.description, status=self.status)

    def www_authenticate(self, realm: str) -> str | None:
        """The ``WWW-Authenticate`` value, or None where a Bearer challenge does not apply (503)."""
        if self.status not in (401, 403):
            return None
        parts = [f'realm="{_clean(realm)}"']
        if self.error:
            parts.append(f'error="{self.error}"')
            parts.append(f'error_description="{_clean(self.description)}"')
        if self.scope:
            parts.append(f'scope="{_clean(self.scope)}"')
        return "Bearer " + ", ".join(parts)


def no_credentials() -> AuthFailure:
    return AuthFailure(401, "login", "this endpoint needs a bearer token (Authorization: Bearer ...)")


def token_invalid(description: str) -> AuthFailure:
    return AuthFailure(401, "login", description, error="invalid_token")


def token_expired() -> AuthFailure:
    return AuthFailure(401, "expired", "the access token has expired", error="invalid_token")


def forbidden(scope: str, why: str | None = None) -> AuthFailure:
    """403 for a missing scope; ``why`` says what about the request needs it, when that is not obvious."""
    lead = f"{why}, which the token's scopes do not cover" if why else "the token's scopes do not cover this request"
    return AuthFailure(403, "forbidden", f"{lead}; it needs {scope}", error="insufficient_scope", scope=scope)


def not_owner(what: str, admin_scope: str) -> AuthFailure:
    """403 for acting on what another client made (a Subscription) without our admin scope."""
    return AuthFailure(403, "forbidden", f"{what} belongs to another client; acting on another client's "
                       f"subscriptions needs {admin_scope}", error="insufficient_scope", scope=admin_scope)


def keys_unavailable() -> AuthFailure:
    return AuthFailure(503, "transient", "the authorisation server's signing keys are unavailable; try later")


def _clean(text: str) -> str:
    return _UNSAFE.sub("?", text)
