"""The table of tokens this service issued itself. It holds a hash of each token, never the token."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Column
from sqlmodel import Field, SQLModel

from service.db.tables import UTCDateTime

__all__ = ["ApiToken"]


def _utc(**kw: object) -> Any:
    return Field(sa_column=Column(UTCDateTime(), **kw))  # type: ignore[call-overload]


class ApiToken(SQLModel, table=True):
    """One minted bearer token: who holds it, what it may do, and its life."""

    __tablename__ = "api_token"
    id: int | None = Field(default=None, primary_key=True)
    client: str = Field(index=True, max_length=64)
    scope: str  # space-separated SMART scopes, as minted
    token_hash: str = Field(unique=True, max_length=64)  # sha256 hex of the whole token
    created_at: datetime = _utc(nullable=False)
    revoked_at: datetime | None = _utc(nullable=True)
    last_used_at: datetime | None = _utc(nullable=True)
