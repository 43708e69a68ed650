"""SQLModel tables. One row per current resource, one per version, the raw requests beside them.

Patient data is kept to what identity needs: references and identifiers, never names.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import Column, DateTime, Index, LargeBinary, UniqueConstraint
from sqlalchemy.types import TypeDecorator
from sqlmodel import Field, SQLModel

__all__ = [
    "AuditRecord",
    "DeliveryAttempt",
    "Escalation",
    "FlagAck",
    "FhirVersion",
    "FlagRecord",
    "InsulinRecord",
    "ObservationRecord",
    "PatientAlias",
    "ReceivedRequest",
    "SubscriptionEvent",
    "SubscriptionRecord",
]


class UTCDateTime(TypeDecorator[datetime]):
    """Aware UTC in and out; SQLite stores no zone, so it is restored on the way out."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime refused: store aware UTC")
        return value.astimezone(UTC)

    def process_result_value(self, value: datetime | None, dialect: Any) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def _utc(**kw: Any) -> Any:
    return Field(sa_column=Column(UTCDateTime(), **kw))


class PatientAlias(SQLModel, table=True):
    """Every way a feed names a patient, mapped to one internal key.

    ``alias`` is ``ref:<literal reference>`` or ``id:<system>|<value>``.
    """

    __tablename__ = "patient_alias"
    alias: str = Field(primary_key=True)
    patient_key: str = Field(index=True)


class ReceivedRequest(SQLModel, table=True):
    """The exact bytes of a request that changed something: audit and replay read them."""

    __tablename__ = "received_request"
    id: int | None = Field(default=None, primary_key=True)
    received_at: datetime = _utc(nullable=False)
    interaction: str  # "transaction", "batch", "create", "update"
    body: bytes = Field(sa_column=Column(LargeBinary, nullable=False))


class ObservationRecord(SQLModel, table=True):
    """The current version of a watched Observation, with its normalised value."""

    __tablename__ = "observation"
    __table_args__ = (
        UniqueConstraint("identifier_system", "identifier_value", name="uq_observation_identifier"),
        Index("ix_observation_patient_effective", "patient_key", "effective"),
    )
    id: str = Field(primary_key=True)
    identifier_system: str
    identifier_value: str
    patient_key: str
    subject_reference: str  # the reference as the sender wrote it
    loinc: str = Field(index=True)
    analyte: str
    specimen: str
    calculated: bool = False
    status: str
    value: float | None = None  # canonical unit; None when not numeric
    comparator: str | None = None
    # The value and unit as the lab sent them (the unit's text, else its UCUM code), for sentences.
    sent_value: float | None = None
    sent_unit: str | None = None
    effective: datetime = _utc(nullable=False)
    issued: datetime | None = _utc(nullable=True)
    encounter: str | None = None
    replaces: str | None = None  # "Observation/<id>" or "id:<system>|<value>" of a result this one replaces
    quality: str | None = None  # a sample-quality remark the lab sent (e.g. haemolysed)
    version_id: int = 1
    last_updated: datetime = _utc(nullable=False)
    content_hash: str


class InsulinRecord(SQLModel, table=True):
    """The current version of a MedicationAdministration whose medication policy counts as insulin."""

    __tablename__ = "insulin_administration"
    __table_args__ = (
        UniqueConstraint("identifier_system", "identifier_value", name="uq_insulin_identifier"),
        Index("ix_insulin_patient_start", "patient_key", "start"),
    )
    id: str = Field(primary_key=True)
    identifier_system: str
    identifier_value: str
    patient_key: str
    subject_reference: str
    status: str
    medication: str
    route: str | None = None
    start: datetime = _utc(nullable=False)
    end: datetime | None = _utc(nullable=True)
    version_id: int = 1
    last_updated: datetime = _utc(nullable=False)
    content_hash: str


class FhirVersion(SQLModel, table=True):
    """Every version of every resource we serve, as served (``_history`` and vread read this)."""

    __tablename__ = "fhir_version"
    resource_type: str = Field(primary_key=True)
    id: str = Field(primary_key=True)
    version_id: int = Field(primary_key=True)
    last_updated: datetime = _utc(nullable=False)
    request_id: int | None = None  # ReceivedRequest that carried it
    resource: bytes = Field(sa_column=Column(LargeBinary, nullable=False))  # FHIR JSON as served


class FlagRecord(SQLModel, table=True):
    """The current version of a Flag: one per (patient, rule, episode), reactivated if it recurs."""

    __tablename__ = "flag"
    __table_args__ = (
        UniqueConstraint("patient_key", "rule", "episode", name="uq_flag_episode"),
        Index("ix_flag_patient_status", "patient_key", "status"),
        Index("ix_flag_last_updated", "last_updated"),
    )
    id: str = Field(primary_key=True)
    patient_key: str
    rule: str
    episode: str
    status: str  # active | inactive | entered-in-error
    priority: str  # high | medium | low
    period_start: datetime = _utc(nullable=False)
    period_end: datetime | None = _utc(nullable=True)
    evidence: str  # JSON list of version-specific references
    numbers: str  # JSON object of the computed numbers
    sentence: str
    encounter: str | None = None
    policy_hash: str
    raised_at: datetime = _utc(nullable=False)  # wall-clock time this episode's flag was (re)raised
    version_id: int = 1
    last_updated: datetime = _utc(nullable=False)
    # When the priority responders were last paged for began (raised, or a paged rise): an
    # acknowledgement covers the Flag only if made at or after it.
    priority_since: datetime = _utc(nullable=False)
    # What the responder topic (flag-alert) last carried, so every replica and a restart judge the next
    # version against the same page. None: nothing recorded (then the next version pages).
    alerted_priority: str | None = None
    alerted_measure: float | None = None


class AuditRecord(SQLModel, table=True):
    """An AuditEvent (append-only): the JSON as served, and the columns its search needs."""

    __tablename__ = "audit_event"
    __table_args__ = (
        Index("ix_audit_recorded", "recorded"),
        Index("ix_audit_patient", "patient_key", "recorded"),
        Index("ix_audit_client", "client", "recorded"),
    )
    id: str = Field(primary_key=True)
    recorded: datetime = _utc(nullable=False)
    subtype: str
    client: str
    patient_key: str | None = None
    outcome: str
    resource: bytes = Field(sa_column=Column(LargeBinary, nullable=False))


class FlagAck(SQLModel, table=True):
    """An acknowledgement of a Flag by the team: who, when, with an optional note."""

    __tablename__ = "flag_ack"
    __table_args__ = (Index("ix_flag_ack_flag", "flag_id", "acknowledged_at"),)
    id: str = Field(primary_key=True)
    flag_id: str
    flag_version: int
    acknowledged_at: datetime = _utc(nullable=False)
    client: str  # the token's client
    person: str | None = None  # the person who acknowledged, when the caller named one
    note: str | None = None


class Escalation(SQLModel, table=True):
    """One escalation of an unacknowledged Flag; (flag, round) is unique so no round fires twice."""

    __tablename__ = "flag_escalation"
    __table_args__ = (UniqueConstraint("flag_id", "round", name="uq_escalation_round"),)
    id: str = Field(primary_key=True)
    flag_id: str
    round: int
    escalated_at: datetime = _utc(nullable=False)


class SubscriptionRecord(SQLModel, table=True):
    """A subscriber's Subscription (backport on R4), its event counter and its delivery lease."""

    __tablename__ = "subscription"
    id: str = Field(primary_key=True)
    status: str  # requested | active | error | off
    topic: str
    resource: bytes = Field(sa_column=Column(LargeBinary, nullable=False))  # as submitted, without id/meta
    events_since_start: int = 0
    error: str | None = None
    created_at: datetime = _utc(nullable=False)
    last_sent_at: datetime | None = _utc(nullable=True)
    version_id: int = 1
    last_updated: datetime = _utc(nullable=False)
    lease_owner: str | None = None
    lease_until: datetime | None = _utc(nullable=True)
    # The client (token client id) that created it; only it, or a caller with lytestream/admin, may act on it.
    # None for subscriptions made before owners were recorded: those are left to the admin.
    owner_client: str | None = Field(default=None, index=True)


class SubscriptionEvent(SQLModel, table=True):
    """The outbox: one row per notification to send, written with the change that caused it."""

    __tablename__ = "subscription_event"
    __table_args__ = (
        UniqueConstraint("subscription_id", "number", name="uq_subscription_event_number"),
        Index("ix_subscription_event_pending", "status", "subscription_id", "id"),
    )
    id: int | None = Field(default=None, primary_key=True)
    subscription_id: str
    number: int | None = None  # event number; None for handshake and heartbeat
    kind: str  # handshake | heartbeat | event-notification
    focus_id: str | None = None  # Flag id
    focus_version: int | None = None
    interaction: str | None = None  # create | update
    created_at: datetime = _utc(nullable=False)
    status: str = "pending"  # pending | sent | failed
    attempts: int = 0
    next_attempt_at: datetime = _utc(nullable=False)
    sent_at: datetime | None = _utc(nullable=True)
    last_error: str | None = None


class DeliveryAttempt(SQLModel, table=True):
    """Every try to deliver an outbox row: the delivery log."""

    __tablename__ = "delivery_attempt"
    __table_args__ = (Index("ix_delivery_attempt_event", "event_id"),)
    id: int | None = Field(default=None, primary_key=True)
    event_id: int
    subscription_id: str
    at: datetime = _utc(nullable=False)
    ok: bool
    status_code: int | None = None
    error: str | None = None
    elapsed_ms: int = 0
