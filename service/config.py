"""The one settings object. Nothing else in the package reads the environment."""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import Field, SecretStr, field_validator
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
    lab_timezone_transitions: Literal["refuse", "accept"] = Field(
        default="refuse",
        description="a local time the zone's clock change makes ambiguous or non-existent: refuse it (422), "
        "or accept it with a warning naming the change",
    )
    max_bundle_entries: int = Field(default=1000, gt=0, description="most entries in one Bundle (413 above)")
    # A full Bundle of 1000 lab results is about 1 MB; each body in progress costs a worker up to about
    # ten times its size (bench/memory_drill.py), so the limit is also what the memory budget rests on.
    max_body_bytes: int = Field(default=4 * 1024 * 1024, gt=0, description="largest request body, in bytes")
    # A full Bundle of 1000 lab results is about 52,000 JSON values; memory grows with the count.
    max_json_values: int = Field(default=100_000, gt=0,
                                 description="most JSON values (objects, arrays, primitives) in one request")
    max_concurrent_bodies: int = Field(default=2, gt=0,
                                       description="requests per worker reading and processing a body at once")
    body_timeout_seconds: float = Field(default=10.0, gt=0,
                                        description="the whole request body must arrive within this")
    # FHIR R4: string.value has maxLength 1048576 (characters); a deployment may only lower it.
    max_string_chars: int = Field(default=1024 * 1024, gt=0, le=1024 * 1024,
                                  description="longest string (or element name) accepted, in characters")
    lookback_hours: float = Field(default=72.0, gt=0, description="how far back the timeline reaches")
    page_size_default: int = Field(default=50, gt=0, description="search results per page without _count")
    page_size_max: int = Field(default=500, gt=0, description="largest _count honoured")
    policy_file: Path | None = Field(default=None, description="site policy TOML; default: built-in")
    policy_profile: str | None = Field(default=None, description="policy profile, e.g. paediatric")
    scheduler: bool = Field(default=True, description="run the time-driven jobs in this process")
    auth: AuthSettings = Field(default_factory=AuthSettings, description="bearer tokens: minted, JWT or both")
    api_docs: bool = Field(
        default=False, description="serve /openapi.json and /docs without a token; for development, never in "
                                   "production (they map every route for whoever asks)")
    refusal_audit_per_client: int = Field(
        default=20, gt=0, description="refused requests (401/403) audited one by one per client (or, unauthenticated, "
                                      "per address) per minute and process; the rest are counted")
    refusal_audit_overall: int = Field(
        default=200, gt=0, description="refused requests audited one by one per minute and process, all clients")
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
    # Operations (backup and retention): deploy/, README "Running in production".
    retention_days: float | None = Field(
        default=None, gt=0,
        description="raw request bytes and AuditEvents older than this many days are purged (hourly, in batches, "
                    "the purge itself audited); unset: kept for ever")

    # The board (service/board): a login lasts a shift at most; the open page asks for changes this often.
    board_session_secret: SecretStr | None = Field(
        default=None, description="key that signs board session cookies; give every replica the same one "
                                  "(default: a random key kept in data_dir/board-session.key, shared by the "
                                  "workers and restarts of one machine)")
    board_session_hours: float = Field(default=8.0, gt=0, le=24, description="how long a board login lasts")
    board_refresh_seconds: float = Field(default=5.0, ge=1, description="how often an open board asks for changes")

    # --- operations: logs, metrics (issue 12, observability) ---
    log_level: Literal["debug", "info", "warning", "error"] = Field(
        default="info", description="JSON log lines on stderr at this level and above (`serve --log-level`)")
    # Off by default: the metrics name subscriptions and feeding clients, which is the hospital's network map.
    # "open" is for a scraper on the same trusted network; "token" asks for any valid bearer token.
    metrics: Literal["off", "open", "token"] = Field(
        default="off", description="/metrics (Prometheus text) on the main port: off (404), open (no token), or "
                                   "token (any valid bearer token)")
    metrics_multiprocess_dir: Path | None = Field(
        default=None, description="set by `serve --workers N` (N > 1): where the workers' counters are shared "
                                  "(prometheus_client multiprocess mode); not set by hand")
    # --- end operations ---

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
