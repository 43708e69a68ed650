"""Reads for the board: the active Flags with what the team needs beside each. Keyword-only, session first.

A fixed number of queries whatever the number of Flags (one per table), so the board costs the same
with 5 Flags or 200 (bench/board_benchmark.py measures it).
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any

import orjson
from sqlalchemy import func, select, tuple_
from sqlmodel import Session

from service.board.views import AckFacts, FlagFacts, LatestValue
from service.db.patients import patient_identifiers
from service.db.tables import Escalation, FhirVersion, FlagAck, FlagRecord, ObservationRecord
from service.domain.findings import Rule
from service.fhir.normalise import parse_datetime

__all__ = ["active_flag_facts", "flag_facts"]

_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]
_ACK = FlagAck.__table__  # type: ignore[attr-defined]
_ESC = Escalation.__table__  # type: ignore[attr-defined]
_V = FhirVersion.__table__  # type: ignore[attr-defined]
_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]


def active_flag_facts(*, session: Session) -> list[FlagFacts]:
    rows = session.execute(select(_FLAG).where(_FLAG.c.status == "active")).all()
    return _facts(session, rows)


def flag_facts(*, session: Session, flag_id: str) -> tuple[FlagFacts, str, list[str], str] | None:
    """One Flag (any status): its facts, its patient key, its evidence and its status."""
    row = session.execute(select(_FLAG).where(_FLAG.c.id == flag_id)).first()
    if row is None:
        return None
    return _facts(session, [row])[0], row.patient_key, orjson.loads(row.evidence), row.status


def _facts(session: Session, rows: Sequence[Any]) -> list[FlagFacts]:
    if not rows:
        return []
    ids = [r.id for r in rows]
    names = {key: [n.rpartition("|")[2] for n in found]  # an identifier shown by its value, as on a wristband
             for key, found in patient_identifiers(session=session, patient_keys=[r.patient_key for r in rows]).items()}
    acks = _latest_acks(session, ids)
    escalations = dict(session.execute(select(_ESC.c.flag_id, func.count()).where(_ESC.c.flag_id.in_(ids))
                                       .group_by(_ESC.c.flag_id)).all())
    evidence = {r.id: orjson.loads(r.evidence) for r in rows}
    latest = _latest_values(session, evidence)
    facts = []
    for r in rows:
        ack = acks.get(r.id)
        facts.append(FlagFacts(
            id=r.id, version_id=r.version_id, rule=r.rule,
            rule_display=Rule(r.rule).display,  # as the Flag's coding carries it
            priority=r.priority, sentence=r.sentence, raised_at=r.raised_at,
            identifiers=names.get(r.patient_key, []), encounter=r.encounter,
            latest=latest.get(r.id),
            ack=None if ack is None else AckFacts(by=ack[0], at=ack[1], note=ack[2],
                                                  covers=ack[1] >= r.priority_since),
            escalations=int(escalations.get(r.id, 0)), last_updated=r.last_updated,
        ))
    return facts


def _latest_acks(session: Session, flag_ids: list[str]) -> dict[str, tuple[str, datetime, str | None]]:
    newest: dict[str, tuple[str, datetime, str | None]] = {}
    for fid, person, client, at, note in session.execute(
            select(_ACK.c.flag_id, _ACK.c.person, _ACK.c.client, _ACK.c.acknowledged_at, _ACK.c.note)
            .where(_ACK.c.flag_id.in_(flag_ids)).order_by(_ACK.c.acknowledged_at, _ACK.c.id)):
        newest[fid] = (f"{person} ({client})" if person else client, at, note)
    return newest


def _latest_values(session: Session, evidence: dict[str, list[str]]) -> dict[str, LatestValue]:
    """Per Flag, its newest cited result as the lab sent it (value and unit of that exact version)."""
    wanted: dict[tuple[str, int], list[str]] = {}
    for fid, refs in evidence.items():
        for ref in refs:
            parts = ref.split("/")
            if parts[0] == "Observation" and len(parts) == 4 and parts[3].isdigit():
                wanted.setdefault((parts[1], int(parts[3])), []).append(fid)
    if not wanted:
        return {}
    analytes = dict(session.execute(select(_OBS.c.id, _OBS.c.analyte)
                                    .where(_OBS.c.id.in_(sorted({k[0] for k in wanted})))).all())
    best: dict[str, LatestValue] = {}
    for oid, resource in session.execute(
            select(_V.c.id, _V.c.resource).where(_V.c.resource_type == "Observation",
                                                 tuple_(_V.c.id, _V.c.version_id).in_(list(wanted)))):
        obs = orjson.loads(resource)
        quantity = obs.get("valueQuantity") or {}
        when = obs.get("effectiveDateTime") or obs.get("effectiveInstant") or (obs.get("effectivePeriod") or {}).get(
            "start")
        if "value" not in quantity or not when:
            continue
        value = LatestValue(analyte=str(analytes.get(oid, "result")), value=f"{quantity.get('comparator', '')}{_number(quantity['value'])}",
                            unit=str(quantity.get("unit") or quantity.get("code") or ""),
                            collected=parse_datetime(when))
        for fid in wanted.get((oid, int(obs["meta"]["versionId"])), []):
            if fid not in best or value.collected > best[fid].collected:
                best[fid] = value
    return best


def _number(value: object) -> str:
    text = repr(value) if isinstance(value, float) else str(value)
    return text[:-2] if text.endswith(".0") else text
