"""What the responder topic last carried for each Flag, kept on the flag row so that every replica and a
restarted service judge the next version against the same page. Keyword-only, session first, never
commits.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import update
from sqlmodel import Session

from service.db.tables import FlagRecord
from service.domain.alerting import Paged
from service.domain.findings import Priority

__all__ = ["paged_of", "record_page"]

_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]


def paged_of(row: object) -> Paged:
    """The last page recorded on a flag row (a row of the ``flag`` table)."""
    priority = getattr(row, "alerted_priority", None)
    measure = getattr(row, "alerted_measure", None)
    return Paged(Priority(priority) if priority else None, None if measure is None else float(measure))


def record_page(*, session: Session, flag_id: str, paged: Paged, reopens_escalation: bool, now: datetime) -> None:
    """Record a page on the responder topic; one that asks for a fresh acknowledgement (raised, a
    priority rise) also starts the priority, so acknowledgements made before it no longer cover it."""
    values: dict[str, object] = {
        "alerted_priority": None if paged.priority is None else paged.priority.value,
        "alerted_measure": paged.measure,
    }
    if reopens_escalation:
        values["priority_since"] = now
    session.execute(update(_FLAG).where(_FLAG.c.id == flag_id).values(**values))
