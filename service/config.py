"""The one settings object. Nothing else in the package reads the environment."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from service.auth.settings import AuthSettings

__all__ = ["Settings", "get_settings"]


class Settings(BaseSettings):
    """Deployment settings, from ``LYTESTREAM_*`` environment variables or CLI options."""

    model_config = SettingsConfigDict(env_prefix="LYTESTREAM_", extra="forbid", env_nested_delimiter="__")

    data_dir: Path = Field(default=Path("./lytestream-data"), description="where the SQLite file lives")
    database_url: str | None = Field(
        default=None, description="SQLAlchemy URL; default sqlite:///<data_dir>/lytestream.db"
    )
    base_url: str = Field(default="http://localhost:8080/fhir", description="public FHIR base URL")
    lab_timezone: str | None = Field(
        default=None,
        description="IANA zone of the lab clock; when set, date-times without an offset are read in it",
    )
    max_bundle_entries: int = Field(default=1000, gt=0)
    max_body_bytes: int = Field(default=10 * 1024 * 1024, gt=0)
    lookback_hours: float = Field(default=72.0, gt=0, description="how far back the timeline reaches")
    page_size_default: int = Field(default=50, gt=0)
    page_size_max: int = Field(default=500, gt=0)
    policy_file: Path | None = Field(default=None, description="site policy TOML; default: built-in")
    policy_profile: str | None = Field(default=None, description="policy profile, e.g. paediatric")
    scheduler: bool = Field(default=True, description="run the time-driven jobs in this process")
    auth: AuthSettings = Field(default_factory=AuthSettings, description="bearer tokens: minted, JWT or both")
    recheck_seconds: float = Field(default=60.0, gt=0, description="how often time-driven flags are rechecked")
    deliver_seconds: float = Field(default=2.0, gt=0, description="how often the outbox is drained")
    allow_http_endpoints: bool = Field(default=False, description="accept plain-http rest-hook endpoints")
    # 5 s: a paging endpoint that has not answered by then has failed this try, and the lease (which
    # must outlast a send) stays short, so a crashed replica's subscriptions are taken over sooner.
    delivery_timeout_seconds: float = Field(default=5.0, gt=0, description="one notification POST, at most")
    delivery_base_seconds: float = Field(default=2.0, gt=0, description="first retry waits up to this")
    delivery_cap_seconds: float = Field(default=300.0, gt=0, description="no retry waits longer")
    delivery_max_attempts: int = Field(
        default=12, gt=0,
        description="then the subscription goes to error (with a high-priority Flag queued: as many attempts "
                    "as keep it trying as long at the urgent cap)",
    )
    delivery_urgent_cap_seconds: float = Field(
        default=10.0, gt=0,
        description="no retry waits longer while a high-priority Flag's notification is queued",
    )
    delivery_lease_seconds: float = Field(
        default=10.0, gt=0,
        description="a replica's claim on a subscription lapses this long after its last send unless renewed "
                    "(never shorter than the send timeout + 2 s); another replica takes over after it",
    )

    @field_validator("lab_timezone")
    @classmethod
    def _known_zone(cls, value: str | None) -> str | None:
        if value is not None:
            try:
                ZoneInfo(value)
            except (ZoneInfoNotFoundError, ValueError) as exc:
                raise ValueError(f"unknown IANA time zone {value!r}") from exc
        return value

    @property
    def resolved_database_url(self) -> str:
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.data_dir / 'lytestream.db').as_posix()}"

    @property
    def is_sqlite(self) -> bool:
        return self.resolved_database_url.startswith("sqlite")


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    return Settings()
