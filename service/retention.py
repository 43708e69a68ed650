"""Retention: raw request bytes and AuditEvents older than the site's period are purged, in batches.

The bytes of each request (``received_request``) are kept so that audit and replay can read what
was sent; AuditEvents are the access trail. Both hold patient data and both grow without end, so a
site sets how long it must keep them (``LYTESTREAM_RETENTION_DAYS``) and nothing older survives.
Each batch is its own short transaction, so ingest never waits behind one large delete. The purge
is itself audited: one AuditEvent with the counts and the cut-off, never what was deleted.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import ColumnElement, Table, delete, select
from sqlmodel import Session

from service.db.audit import record_audit
from service.db.engine import Database
from service.db.tables import AuditRecord, ReceivedRequest
from service.fhir.audit_render import AuditFacts, Requester
from service.fhir.render import fhir_instant

__all__ = ["Purged", "purge_expired", "SYSTEM_CLIENT"]

_REQUESTS: Table = ReceivedRequest.__table__  # type: ignore[attr-defined]
_AUDIT: Table = AuditRecord.__table__  # type: ignore[attr-defined]
SYSTEM_CLIENT = "lytestream"  # the service itself, as the agent of its own housekeeping
BATCH = 1000


@dataclass(frozen=True, slots=True)
class Purged:
    received_requests: int
    audit_events: int
    before: datetime  # everything recorded strictly before this instant went

    @property
    def total(self) -> int:
        return self.received_requests + self.audit_events


def purge_expired(db: Database, *, days: float, now: datetime, base_url: str, batch: int = BATCH) -> Purged:
    """Delete raw requests and AuditEvents recorded more than ``days`` before ``now``; audit the purge."""
    if days <= 0:
        raise ValueError("retention must be a positive number of days")
    before = now - timedelta(days=days)
    requests = _purge(db, _REQUESTS, _REQUESTS.c.received_at, before, batch)
    audits = _purge(db, _AUDIT, _AUDIT.c.recorded, before, batch)
    purged = Purged(received_requests=requests, audit_events=audits, before=before)
    if purged.total:
        facts = AuditFacts(subtype="purge", recorded=now, outcome="0",
                           requester=Requester(client=SYSTEM_CLIENT, address=None, request_id=f"purge-{uuid.uuid4()}"),
                           details={"received-requests": str(requests), "audit-events": str(audits),
                                    "recorded-before": fhir_instant(before), "retention-days": f"{days:g}"})
        with db.session(write=True) as session:
            record_audit(session=session, events=[(facts, None)], base_url=base_url)
    return purged


def _purge(db: Database, table: Table, when: ColumnElement[Any], before: datetime, batch: int) -> int:
    total = 0
    while True:
        def one_batch(session: Session) -> int:
            ids = select(table.c.id).where(when < before).order_by(table.c.id).limit(batch)
            # The ids first, then the delete: SQLite has no DELETE … LIMIT, PostgreSQL none either.
            chosen = [row[0] for row in session.execute(ids)]
            if chosen:
                session.execute(delete(table).where(table.c.id.in_(chosen)))
            return len(chosen)

        n = db.unit_of_work(one_batch)
        total += n
        if n < batch:
            return total
