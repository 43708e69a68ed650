"""Acknowledgements and escalations of Flags. Keyword-only, session first, never commits."""

from __future__ import annotations

import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, cast

from sqlalchemy import CursorResult, func, insert, select
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlmodel import Session

from service.db.tables import Escalation, FlagAck, FlagRecord

__all__ = ["DueEscalation", "acknowledge", "claim_escalation", "due_escalations", "first_acks"]

_ACK = FlagAck.__table__  # type: ignore[attr-defined]
_ESC = Escalation.__table__  # type: ignore[attr-defined]
_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]


def acknowledge(*, session: Session, flag_id: str, client: str, note: str | None, now: datetime) -> Any:
    """Record an acknowledgement of the Flag's current version; returns the flag row (None if unknown)."""
    flag = session.execute(select(_FLAG).where(_FLAG.c.id == flag_id)).first()
    if flag is None:
        return None
    session.execute(insert(_ACK).values(id=str(uuid.uuid4()), flag_id=flag_id, flag_version=flag.version_id,
                                        acknowledged_at=now, client=client, note=note))
    return flag


def first_acks(*, session: Session, flag_ids: Sequence[str]) -> dict[str, datetime]:
    rows = session.execute(select(_ACK.c.flag_id, func.min(_ACK.c.acknowledged_at))
                           .where(_ACK.c.flag_id.in_(list(flag_ids))).group_by(_ACK.c.flag_id))
    return {fid: when for fid, when in rows}


@dataclass(frozen=True)
class DueEscalation:
    flag_id: str
    round: int
    patient_key: str
    version_id: int


def due_escalations(*, session: Session, priorities: Sequence[str], interval: timedelta,
                    now: datetime) -> list[DueEscalation]:
    """Active, unacknowledged Flags of these priorities whose next escalation round has come.

    Round n falls due n x interval after the flag was raised; only the newest due round is returned, so a
    service that was down does not send a burst of stale rounds.
    """
    acked = select(_ACK.c.flag_id).distinct()
    rows = session.execute(select(_FLAG.c.id, _FLAG.c.patient_key, _FLAG.c.version_id, _FLAG.c.raised_at)
                           .where(_FLAG.c.status == "active", _FLAG.c.priority.in_(list(priorities)),
                                  _FLAG.c.id.not_in(acked))).all()
    due: list[DueEscalation] = []
    done = {(fid, rnd) for fid, rnd in session.execute(
        select(_ESC.c.flag_id, _ESC.c.round).where(_ESC.c.flag_id.in_([r.id for r in rows])))}
    for r in rows:
        rounds = int((now - r.raised_at) / interval)
        if rounds >= 1 and (r.id, rounds) not in done:
            due.append(DueEscalation(r.id, rounds, r.patient_key, r.version_id))
    return due


def claim_escalation(*, session: Session, due: DueEscalation, now: datetime) -> bool:
    """Record the round; False when another replica already did (the unique key decides)."""
    dialect = session.get_bind().dialect.name
    stmt = (pg_insert if dialect == "postgresql" else sqlite_insert)(_ESC).values(
        id=str(uuid.uuid4()), flag_id=due.flag_id, round=due.round, escalated_at=now
    ).on_conflict_do_nothing(index_elements=["flag_id", "round"])
    result = cast(CursorResult[Any], session.execute(stmt))
    return bool(result.rowcount)
