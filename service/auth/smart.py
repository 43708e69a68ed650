"""SMART discovery: what a client learns before it asks for a token. Pure.

SMART App Launch 2.x, "Conformance": ``[base]/.well-known/smart-configuration`` is a JSON document with
``token_endpoint``, ``capabilities``, ``grant_types_supported``, ``scopes_supported``…; the
CapabilityStatement announces the same endpoints in the ``oauth-uris`` extension. Only a server that accepts
the authorisation server's tokens (``jwt`` or ``both`` mode) has endpoints to announce; minted tokens come
from ``lytestream token create`` and no client can ask for one over HTTP.
"""

from __future__ import annotations

from typing import Any

from service.auth.scopes import ADMIN_SCOPE
from service.auth.settings import AuthSettings

__all__ = ["OAUTH_URIS", "SCOPED_TYPES", "oauth_uris_extension", "smart_configuration"]

OAUTH_URIS = "http://fhir-registry.smarthealthit.org/StructureDefinition/oauth-uris"
SCOPED_TYPES = ("Observation", "MedicationAdministration", "Flag", "AuditEvent", "Subscription")
_LETTERS = ("c", "r", "u", "d", "s", "rs", "cu", "cruds")  # the combinations README's scope table uses


def _announces(settings: AuthSettings) -> bool:
    return settings.mode in ("jwt", "both") and not settings.disabled and settings.token_endpoint is not None


def smart_configuration(settings: AuthSettings) -> dict[str, Any] | None:
    """The smart-configuration document, or None when this server has no token endpoint to announce."""
    if not _announces(settings):
        return None
    config: dict[str, Any] = {
        "issuer": settings.issuer,
        "jwks_uri": settings.jwks_url,
        "token_endpoint": settings.token_endpoint,
        # Backend services (system/ scopes) obtain tokens by client_credentials.
        "grant_types_supported": ["client_credentials"],
        "token_endpoint_auth_methods_supported": ["private_key_jwt"],
        "token_endpoint_auth_signing_alg_values_supported": list(settings.algorithms),
        "scopes_supported": [f"system/{t}.{letters}" for t in SCOPED_TYPES for letters in _LETTERS]
        + ["system/*.cruds", ADMIN_SCOPE],
        "capabilities": ["client-confidential-asymmetric", "permission-v1", "permission-v2"],
    }
    if settings.authorization_endpoint:
        config["authorization_endpoint"] = settings.authorization_endpoint
    return config


def oauth_uris_extension(settings: AuthSettings) -> dict[str, Any] | None:
    """The CapabilityStatement.rest.security extension naming the token (and authorize) endpoints."""
    if not _announces(settings):
        return None
    subs = [{"url": "token", "valueUri": settings.token_endpoint}]
    if settings.authorization_endpoint:
        subs.append({"url": "authorize", "valueUri": settings.authorization_endpoint})
    return {"url": OAUTH_URIS, "extension": subs}
