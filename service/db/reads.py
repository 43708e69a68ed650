"""Reads for the audit side of ingest: one version, a history, an Observation search page."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import and_, false, func, or_, select, true
from sqlmodel import Session

from service.db.tables import FhirVersion, ObservationRecord, PatientAlias

__all__ = [
    "FlagQuery",
    "ObservationQuery",
    "history",
    "patient_key_for",
    "read_references",
    "read_version",
    "search_flags",
    "search_observations",
]

_V = FhirVersion.__table__  # type: ignore[attr-defined]
_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]
_ALIAS = PatientAlias.__table__  # type: ignore[attr-defined]


def read_version(*, session: Session, resource_type: str, rid: str, version: int | None = None) -> bytes | None:
    """The resource as served at ``version`` (newest when None), or None."""
    stmt = select(_V.c.resource).where(_V.c.resource_type == resource_type, _V.c.id == rid)
    stmt = stmt.where(_V.c.version_id == version) if version is not None else stmt.order_by(_V.c.version_id.desc())
    row = session.execute(stmt.limit(1)).first()
    return bytes(row[0]) if row else None


def history(*, session: Session, resource_type: str, rid: str) -> list[tuple[int, datetime, bytes]]:
    """Every version, newest first."""
    rows = session.execute(
        select(_V.c.version_id, _V.c.last_updated, _V.c.resource)
        .where(_V.c.resource_type == resource_type, _V.c.id == rid)
        .order_by(_V.c.version_id.desc())
    )
    return [(r.version_id, r.last_updated, bytes(r.resource)) for r in rows]


def patient_key_for(*, session: Session, alias: str) -> str | None:
    return session.execute(select(_ALIAS.c.patient_key).where(_ALIAS.c.alias == alias)).scalar_one_or_none()


@dataclass(frozen=True)
class ObservationQuery:
    patient_key: str | None = None
    codes: Sequence[str] | None = None  # None: any code
    ids: Sequence[str] | None = None
    identifiers: Sequence[Sequence[tuple[str | None, str]]] = ()  # AND of ORs of (system or any, value)
    statuses: Sequence[str] | None = None
    updated_from: datetime | None = None
    updated_to: datetime | None = None
    date_from: datetime | None = None  # inclusive
    date_to: datetime | None = None  # exclusive
    sort: str = "-date"
    count: int = 50
    offset: int = 0


def search_observations(*, session: Session, q: ObservationQuery) -> tuple[list[bytes], int]:
    """One page of current Observations as served, and the total number of matches."""
    conds = []
    if q.patient_key is not None:
        conds.append(_OBS.c.patient_key == q.patient_key)
    if q.codes is not None:
        conds.append(_OBS.c.loinc.in_(list(q.codes)))
    if q.ids is not None:
        conds.append(_OBS.c.id.in_(list(q.ids)))
    if q.statuses is not None:
        conds.append(_OBS.c.status.in_(list(q.statuses)))
    for alternatives in q.identifiers:
        conds.append(or_(false(), *(and_(_OBS.c.identifier_value == value,
                                         true() if system is None else _OBS.c.identifier_system == system)
                                    for system, value in alternatives)))
    if q.updated_from is not None:
        conds.append(_OBS.c.last_updated >= q.updated_from)
    if q.updated_to is not None:
        conds.append(_OBS.c.last_updated < q.updated_to)
    if q.date_from is not None:
        conds.append(_OBS.c.effective >= q.date_from)
    if q.date_to is not None:
        conds.append(_OBS.c.effective < q.date_to)
    return _served_page(session, _OBS, "Observation", conds, {"date": _OBS.c.effective}, q.sort, q.count, q.offset)


def _served_page(session: Session, table: Any, rtype: str, conds: list[Any], sort_columns: dict[str, Any],
                 sort: str, count: int, offset: int) -> tuple[list[bytes], int]:
    """One page of current rows of ``table`` as served (joined to their fhir_version), and the total.

    ``sort`` is a FHIR ``_sort`` value: a key of ``sort_columns`` or ``_lastUpdated``, ``-`` for descending.
    """
    where = and_(true(), *conds)
    total = session.execute(select(func.count()).select_from(table).where(where)).scalar_one()
    column = {**sort_columns, "_lastUpdated": table.c.last_updated}[sort.lstrip("-")]
    order = column.desc() if sort.startswith("-") else column.asc()
    rows = session.execute(
        select(_V.c.resource)
        .select_from(table.join(_V, and_(_V.c.resource_type == rtype, _V.c.id == table.c.id,
                                         _V.c.version_id == table.c.version_id)))
        .where(where).order_by(order, table.c.id).limit(count).offset(offset)
    )
    return [bytes(r[0]) for r in rows], int(total)


@dataclass(frozen=True)
class FlagQuery:
    patient_key: str | None = None
    statuses: Sequence[str] | None = None  # None: any
    rules: Sequence[str] | None = None
    priorities: Sequence[str] | None = None
    date_from: datetime | None = None  # the flag's period overlaps [date_from, date_to)
    date_to: datetime | None = None
    updated_from: datetime | None = None
    updated_to: datetime | None = None
    details: Sequence[str] | None = None  # cites any of these: Type/id (any version) or Type/id/_history/n
    acknowledged: bool | None = None  # an acknowledgement is recorded (True) or none is (False)
    # (comparator, minutes) each the delay from raising to the first acknowledgement must meet
    ack_delay: Sequence[tuple[str, float]] = ()
    encounters: Sequence[str] | None = None  # Flag.encounter is any of these references
    sort: str = "-_lastUpdated"
    count: int = 50
    offset: int = 0


def search_flags(*, session: Session, q: FlagQuery) -> tuple[list[bytes], int]:
    """One page of current Flags as served, and the total number of matches."""
    from service.db.tables import FlagRecord

    f = FlagRecord.__table__  # type: ignore[attr-defined]
    conds = []
    if q.patient_key is not None:
        conds.append(f.c.patient_key == q.patient_key)
    if q.statuses is not None:
        conds.append(f.c.status.in_(list(q.statuses)))
    if q.rules is not None:
        conds.append(f.c.rule.in_(list(q.rules)))
    if q.priorities is not None:
        conds.append(f.c.priority.in_(list(q.priorities)))
    if q.date_from is not None:
        conds.append(or_(f.c.period_end.is_(None), f.c.period_end >= q.date_from))
    if q.date_to is not None:
        conds.append(f.c.period_start < q.date_to)
    if q.updated_from is not None:
        conds.append(f.c.last_updated >= q.updated_from)
    if q.updated_to is not None:
        conds.append(f.c.last_updated < q.updated_to)
    if q.details is not None:
        conds.append(or_(false(), *(f.c.evidence.like(_cites(ref), escape="\\") for ref in q.details)))
    if q.encounters is not None:
        conds.append(f.c.encounter.in_(list(q.encounters)))
    if q.acknowledged is not None or q.ack_delay:
        conds += _ack_conditions(session, f, q)
    return _served_page(session, f, "Flag", conds, {"date": f.c.period_start}, q.sort, q.count, q.offset)


_COMPARE = {"eq": "__eq__", "gt": "__gt__", "ge": "__ge__", "lt": "__lt__", "le": "__le__"}


def _ack_conditions(session: Session, f: Any, q: FlagQuery) -> list[Any]:
    """Whether a Flag has an acknowledgement, and how long after its raising the first one came."""
    from service.db.tables import FlagAck

    a = FlagAck.__table__  # type: ignore[attr-defined]
    conds: list[Any] = []
    acked = select(a.c.flag_id).where(a.c.flag_id == f.c.id).exists()
    if q.acknowledged is not None:
        conds.append(acked if q.acknowledged else ~acked)
    if q.ack_delay:
        first = select(func.min(a.c.acknowledged_at)).where(a.c.flag_id == f.c.id).scalar_subquery()
        if session.get_bind().dialect.name == "sqlite":
            seconds = (func.julianday(first) - func.julianday(f.c.raised_at)) * 86400.0
        else:
            seconds = func.extract("epoch", first - f.c.raised_at)
        conds.append(acked)  # a Flag never acknowledged has no delay to compare
        for op, minutes in q.ack_delay:
            conds.append(getattr(seconds, _COMPARE[op])(minutes * 60.0))
    return conds


def _cites(ref: str) -> str:
    """A LIKE pattern for the evidence JSON list holding ``ref`` (a version-specific one, or any version)."""
    literal = ref.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")
    return f'%"{literal}"%' if "/_history/" in ref else f'%"{literal}/\\_history/%'



def read_references(*, session: Session, references: Iterable[str]) -> list[bytes]:
    """Resources named by version-specific references ("Observation/x/_history/2"), as served then."""
    out: list[bytes] = []
    for ref in sorted(set(references)):
        parts = ref.split("/")
        if len(parts) == 4 and parts[2] == "_history" and parts[3].isdigit():
            body = read_version(session=session, resource_type=parts[0], rid=parts[1], version=int(parts[3]))
            if body is not None:
                out.append(body)
    return out
