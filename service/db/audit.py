"""AuditEvent rows: append-only writes and the search the informatics analyst uses."""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime

import orjson
from sqlalchemy import and_, func, insert, select, true
from sqlmodel import Session

from service.db.tables import AuditRecord
from service.fhir.audit_render import AuditFacts, audit_event

__all__ = ["AuditQuery", "record_audit", "search_audit"]

_A = AuditRecord.__table__  # type: ignore[attr-defined]


def record_audit(*, session: Session, events: Iterable[tuple[AuditFacts, str | None]], base_url: str) -> int:
    """Append one AuditEvent per (facts, patient key); returns how many were written."""
    rows = []
    for facts, patient_key in events:
        rid = str(uuid.uuid4())
        body = audit_event(facts, base_url=base_url)
        body["id"] = rid
        rows.append({"id": rid, "recorded": facts.recorded, "subtype": (facts.operation or facts.subtype).lstrip("$"),
                     "client": facts.requester.client, "patient_key": patient_key, "outcome": facts.outcome,
                     "resource": orjson.dumps(body)})
    if rows:
        session.execute(insert(_A), rows)
    return len(rows)


@dataclass(frozen=True)
class AuditQuery:
    date_from: datetime | None = None
    date_to: datetime | None = None
    clients: Sequence[str] = ()
    patient_key: str | None = None
    subtypes: Sequence[str] = ()
    outcomes: Sequence[str] = ()  # AuditEvent.outcome codes: 0 success, 4 minor failure, 8 serious, 12 major
    count: int = 50
    offset: int = 0


def search_audit(*, session: Session, q: AuditQuery) -> tuple[list[bytes], int]:
    conds = []
    if q.date_from is not None:
        conds.append(_A.c.recorded >= q.date_from)
    if q.date_to is not None:
        conds.append(_A.c.recorded < q.date_to)
    if q.clients:
        conds.append(_A.c.client.in_(list(q.clients)))
    if q.patient_key is not None:
        conds.append(_A.c.patient_key == q.patient_key)
    if q.subtypes:
        conds.append(_A.c.subtype.in_(list(q.subtypes)))
    if q.outcomes:
        conds.append(_A.c.outcome.in_(list(q.outcomes)))
    where = and_(true(), *conds)
    total = session.execute(select(func.count()).select_from(_A).where(where)).scalar_one()
    rows = session.execute(select(_A.c.resource).where(where).order_by(_A.c.recorded.desc(), _A.c.id)
                           .limit(q.count).offset(q.offset))
    return [bytes(r[0]) for r in rows], int(total)
