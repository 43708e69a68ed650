"""Acknowledgements and escalations of Flags. Keyword-only, session first, never commits."""

from __future__ import annotations

import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, cast

from sqlalchemy import CursorResult, func, insert, select
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlmodel import Session

from service.db.tables import Escalation, FlagAck, FlagRecord
from service.fhir.flag_render import AckView

__all__ = ["DueEscalation", "acknowledge", "claim_escalation", "covering_acks", "due_escalations",
           "first_acks", "record_ack"]

_ACK = FlagAck.__table__  # type: ignore[attr-defined]
_ESC = Escalation.__table__  # type: ignore[attr-defined]
_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]


def record_ack(*, session: Session, flag_id: str, flag_version: int, client: str, person: str | None,
               note: str | None, now: datetime) -> None:
    """Record an acknowledgement of version ``flag_version`` of the Flag."""
    session.execute(insert(_ACK).values(id=str(uuid.uuid4()), flag_id=flag_id, flag_version=flag_version,
                                        acknowledged_at=now, client=client, person=person, note=note))


def acknowledge(*, session: Session, flag_id: str, client: str, note: str | None, now: datetime) -> Any:
    """The row-only acknowledgement the board called before ``service.acknowledging.acknowledge``
    existed: records an acknowledgement of the current version and returns the flag row (None if
    unknown), writing no Flag version. Kept only until the board calls the service function; then
    delete it."""
    flag = session.execute(select(_FLAG).where(_FLAG.c.id == flag_id)).first()
    if flag is None:
        return None
    record_ack(session=session, flag_id=flag_id, flag_version=flag.version_id, client=client, person=None,
               note=note, now=now)
    return flag


def covering_acks(*, session: Session, flags: Sequence[Any]) -> dict[str, AckView]:
    """The newest acknowledgement that covers each of these flag rows (made at or after the row's
    ``priority_since``), by flag id; a Flag no acknowledgement covers is absent."""
    since = {f.id: f.priority_since for f in flags}
    if not since:
        return {}
    out: dict[str, AckView] = {}
    rows = session.execute(select(_ACK).where(_ACK.c.flag_id.in_(sorted(since)))
                           .order_by(_ACK.c.acknowledged_at, _ACK.c.flag_version, _ACK.c.id))
    for a in rows:
        if a.acknowledged_at >= since[a.flag_id]:  # ordered, so the newest covering one wins
            out[a.flag_id] = AckView(by=a.person or a.client, client=a.client, when=a.acknowledged_at,
                                     note=a.note, version=a.flag_version)
    return out


def first_acks(*, session: Session, flag_ids: Sequence[str]) -> dict[str, datetime]:
    rows = session.execute(select(_ACK.c.flag_id, func.min(_ACK.c.acknowledged_at))
                           .where(_ACK.c.flag_id.in_(list(flag_ids))).group_by(_ACK.c.flag_id))
    return {fid: when for fid, when in rows}


@dataclass(frozen=True)
class DueEscalation:
    flag_id: str
    round: int  # this Flag's escalations so far + 1: the unique key that lets one replica claim it
    patient_key: str
    version_id: int
    priority_since: datetime


def due_escalations(*, session: Session, after: Mapping[str, timedelta], now: datetime,
                    flag_ids: Sequence[str] | None = None) -> list[DueEscalation]:
    """Active Flags of the priorities in ``after`` that no acknowledgement covers and whose escalation
    has come round (``after`` maps a priority to its interval).

    An acknowledgement covers a Flag when made at or after ``priority_since`` (the Flag was raised, or
    paged for a priority rise, then). Escalation n falls due n x interval after ``priority_since``; a
    Flag is due when no escalation has been made since the newest due time, so a service that was down
    sends one escalation, not a burst of stale ones, and a Flag whose priority fell keeps its rhythm
    from its last escalation.
    """
    covered = select(_ACK.c.id).where(_ACK.c.flag_id == _FLAG.c.id,
                                      _ACK.c.acknowledged_at >= _FLAG.c.priority_since).exists()
    query = (select(_FLAG.c.id, _FLAG.c.patient_key, _FLAG.c.version_id, _FLAG.c.priority,
                    _FLAG.c.priority_since)
             .where(_FLAG.c.status == "active", _FLAG.c.priority.in_(list(after)), ~covered))
    if flag_ids is not None:
        query = query.where(_FLAG.c.id.in_(list(flag_ids)))
    rows = session.execute(query).all()
    made: dict[str, list[tuple[int, datetime]]] = {}
    for fid, rnd, at in session.execute(select(_ESC.c.flag_id, _ESC.c.round, _ESC.c.escalated_at)
                                        .where(_ESC.c.flag_id.in_([r.id for r in rows]))):
        made.setdefault(fid, []).append((rnd, at))
    due: list[DueEscalation] = []
    for r in rows:
        interval = after[r.priority]
        rounds = int((now - r.priority_since) / interval)
        if rounds < 1:
            continue
        newest_due = r.priority_since + rounds * interval
        mine = made.get(r.id, [])
        if any(at >= newest_due for _, at in mine):
            continue  # already escalated for this time
        due.append(DueEscalation(r.id, max((rnd for rnd, _ in mine), default=0) + 1, r.patient_key,
                                 r.version_id, r.priority_since))
    return due


def claim_escalation(*, session: Session, due: DueEscalation, after: Mapping[str, timedelta],
                     now: datetime) -> bool:
    """Record the escalation; False when it is no longer due (acknowledged, closed, changed since it
    was found) or another replica already made it (the unique (flag, round) key decides).
    Call under the patient's lock."""
    still = due_escalations(session=session, after=after, now=now, flag_ids=[due.flag_id])
    if still != [due]:
        return False
    dialect = session.get_bind().dialect.name
    stmt = (pg_insert if dialect == "postgresql" else sqlite_insert)(_ESC).values(
        id=str(uuid.uuid4()), flag_id=due.flag_id, round=due.round, escalated_at=now
    ).on_conflict_do_nothing(index_elements=["flag_id", "round"])
    result = cast(CursorResult[Any], session.execute(stmt))
    return bool(result.rowcount)
