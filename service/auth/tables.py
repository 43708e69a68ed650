"""The table of tokens this service issued itself. It holds a hash of each token, never the token."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Column, UniqueConstraint
from sqlmodel import Field, SQLModel

from service.db.tables import UTCDateTime

__all__ = ["ApiToken"]


def _utc(*, nullable: bool) -> Any:
    return Field(sa_column=Column(UTCDateTime(), nullable=nullable))


class ApiToken(SQLModel, table=True):
    """One minted bearer token: who holds it, what it may do, and its life."""

    __tablename__ = "api_token"
    __table_args__ = (UniqueConstraint("token_hash", name="uq_api_token_hash"),)
    id: int | None = Field(default=None, primary_key=True)
    client: str = Field(index=True, max_length=64)
    scope: str  # space-separated SMART v2 system scopes (v1 forms are stored as their v2 equivalents)
    token_hash: str = Field(max_length=64)  # sha256 hex of the whole token; verification looks it up
    created_at: datetime = _utc(nullable=False)
    revoked_at: datetime | None = _utc(nullable=True)
    last_used_at: datetime | None = _utc(nullable=True)
