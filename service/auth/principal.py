"""Who is calling, and what they may do: the result of checking a bearer token."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Literal

from service.auth.scopes import Grant, allows

__all__ = ["Principal", "TokenKind"]

TokenKind = Literal["minted", "jwt", "disabled"]


@dataclass(frozen=True, slots=True)
class Principal:
    """A caller. ``client_id`` is safe to log and to put into AuditEvent agents; the token never is."""

    client_id: str
    grants: tuple[Grant, ...]
    kind: TokenKind
    token_id: int | None = None  # ApiToken.id for minted tokens
    subject: str | None = None  # JWT ``sub`` when it differs from the client
    admin: bool = False  # holds lytestream/admin: may act on other clients' Subscriptions
    expires: datetime | None = None  # a JWT's exp: nothing this caller proved outlives it (board sessions)

    def allows(self, resource_type: str, interaction: str) -> bool:
        return allows(self.grants, resource_type, interaction)
