"""Rows for the informatics summary (service.summary).

Queries only: keyword-only, session first, never commits.

Flags are read as served (``fhir_version`` JSON), so the figures can be recounted from what subscribers and
readers were actually given; the patient key comes from the ``flag`` row, since the JSON names the patient
only by its FHIR reference.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from datetime import datetime
from typing import Any, TypeVar

import orjson
from sqlalchemy import func, select
from sqlmodel import Session

from service.db.tables import (
    AuditRecord,
    DeliveryAttempt,
    Escalation,
    FhirVersion,
    FlagAck,
    FlagRecord,
    ObservationRecord,
    SubscriptionEvent,
)
from service.domain.coverage import unread_result
from service.domain.values import Analyte, LabResult, ResultStatus, Specimen
from service.fhir.flag_render import EVALUATION_URL, FLAG_DETAIL_URL, FLAG_PRIORITY_URL
from service.fhir.normalise import parse_datetime
from service.policy import Policy
from service.summary import (
    AckFact,
    EscalationFact,
    EvidenceFact,
    FlagVersionFact,
    OutboxFact,
    ResultFact,
    SummaryFacts,
)

__all__ = ["audit_rows", "load_facts"]

_V = FhirVersion.__table__  # type: ignore[attr-defined]
_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]
_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]
_ESC = Escalation.__table__  # type: ignore[attr-defined]
_E = SubscriptionEvent.__table__  # type: ignore[attr-defined]
_A = DeliveryAttempt.__table__  # type: ignore[attr-defined]
_AUDIT = AuditRecord.__table__  # type: ignore[attr-defined]
_ACK = FlagAck.__table__  # type: ignore[attr-defined]
_PRIORITY = {"PH": "high", "PM": "medium", "PL": "low"}
_CHUNK = 500  # keeps IN lists well inside every backend's parameter limit

T = TypeVar("T")


def load_facts(*, session: Session, start: datetime, end: datetime, policy: Policy) -> SummaryFacts:
    """Everything :func:`service.summary.summarise` needs for [start, end); ``policy`` decides which
    stored results no rule can read."""
    cohort = [fid for (fid,) in session.execute(
        select(_V.c.id).where(_V.c.resource_type == "Flag", _V.c.version_id == 1,
                              _V.c.last_updated >= start, _V.c.last_updated < end))]
    versions = _flag_versions(session, cohort)
    cited = sorted({ref for v in versions if v.version_id == 1 for ref in v.evidence
                    if ref.startswith("Observation/")})
    return SummaryFacts(
        flag_versions=versions,
        evidence=_evidence(session, cited),
        results=_results(session, start, end, policy),
        first_acks=_first_acks(session, cohort),
        escalations=_escalations(session, cohort),
        outbox=_outbox(session, start, end),
        audit_counts=_audit_counts(session, start, end),
        suspect_drops=_suspect_drops(session, start, end),
    )


def _first_acks(session: Session, flag_ids: Sequence[str]) -> list[AckFact]:
    """Each Flag's first acknowledgement: when, by whom, with its note (ties: the lower id)."""
    first: dict[str, AckFact] = {}
    for ids in _chunks(flag_ids):
        rows = session.execute(select(_ACK.c.flag_id, _ACK.c.acknowledged_at, _ACK.c.client, _ACK.c.person,
                                      _ACK.c.note, _ACK.c.id)
                               .where(_ACK.c.flag_id.in_(list(ids)))
                               .order_by(_ACK.c.flag_id, _ACK.c.acknowledged_at, _ACK.c.id))
        for fid, at, client, person, note, _ in rows:
            # The named person when one was given (the board's sign-in, $acknowledge's who), with the client.
            first.setdefault(fid, AckFact(fid, at, f"{person} ({client})" if person else str(client), note))
    return [first[k] for k in sorted(first)]


def _chunks(items: Sequence[T]) -> Iterator[Sequence[T]]:
    for i in range(0, len(items), _CHUNK):
        yield items[i : i + _CHUNK]


def _flag_versions(session: Session, flag_ids: Sequence[str]) -> list[FlagVersionFact]:
    out: list[FlagVersionFact] = []
    for ids in _chunks(flag_ids):
        keys = dict(session.execute(select(_FLAG.c.id, _FLAG.c.patient_key)
                                    .where(_FLAG.c.id.in_(list(ids)))).all())
        rows = session.execute(select(_V.c.id, _V.c.version_id, _V.c.last_updated, _V.c.resource).where(
            _V.c.resource_type == "Flag", _V.c.id.in_(list(ids))))
        for rid, version, written, body in rows:
            out.append(_flag_fact(rid, version, written, orjson.loads(body), keys.get(rid, "")))
    out.sort(key=lambda v: (v.flag_id, v.version_id))
    return out


def _flag_fact(rid: str, version: int, written: datetime, flag: dict[str, Any],
               patient_key: str) -> FlagVersionFact:
    ext = flag.get("extension") or []
    evaluation = next((e.get("extension") or [] for e in ext if e.get("url") == EVALUATION_URL), [])
    rule = next((e["valueCode"] for e in evaluation if e.get("url") == "rule"), None) \
        or flag["code"]["coding"][0]["code"]
    code = next((e["valueCodeableConcept"]["coding"][0]["code"] for e in ext
                 if e.get("url") == FLAG_PRIORITY_URL), "")
    return FlagVersionFact(
        flag_id=rid, version_id=int(version), written_at=written, rule=str(rule),
        priority=_PRIORITY.get(code, code), status=str(flag["status"]), patient_key=patient_key,
        period_start=parse_datetime(flag["period"]["start"]),
        evidence=tuple(e["valueReference"]["reference"] for e in ext if e.get("url") == FLAG_DETAIL_URL),
        sentence=str((flag.get("code") or {}).get("text", "")),
        period_end=parse_datetime(flag["period"]["end"]) if flag["period"].get("end") else None,
        subject=_subject(flag.get("subject") or {}),
    )


def _subject(subject: dict[str, Any]) -> str:
    """The patient as the Flag names it: the reference the feed used, else its identifier."""
    if subject.get("reference"):
        return str(subject["reference"])
    ident = subject.get("identifier") or {}
    return f"{ident.get('system', '')}|{ident.get('value', '')}" if ident else ""


def _split(ref: str) -> tuple[str, int] | None:
    """("<id>", version) of "Observation/<id>/_history/<v>"; None for a versionless reference."""
    parts = ref.split("/")
    if len(parts) == 4 and parts[2] == "_history" and parts[3].isdigit():
        return parts[1], int(parts[3])
    return None


def _evidence(session: Session, references: Sequence[str]) -> list[EvidenceFact]:
    wanted = {ref: key for ref in references if (key := _split(ref)) is not None}
    keys = set(wanted.values())
    ids = sorted({rid for rid, _ in keys})
    arrived: dict[str, datetime] = {}
    issued: dict[tuple[str, int], datetime | None] = {}
    shown: dict[tuple[str, int], tuple[str | None, str | None, datetime | None]] = {}
    for chunk in _chunks(ids):
        rows = session.execute(select(_V.c.id, _V.c.version_id, _V.c.last_updated, _V.c.resource).where(
            _V.c.resource_type == "Observation", _V.c.id.in_(list(chunk))))
        for rid, version, written, body in rows:
            if version == 1:
                arrived[rid] = written
            if (rid, version) in keys:
                obs = orjson.loads(body)
                value = obs.get("issued")
                issued[(rid, version)] = parse_datetime(value) if value else None
                shown[(rid, version)] = _value_as_sent(obs)
    return [EvidenceFact(ref, issued[key], arrived[key[0]], *shown[key]) for ref, key in sorted(wanted.items())
            if key in issued and key[0] in arrived]


def _value_as_sent(obs: dict[str, Any]) -> tuple[str | None, str | None, datetime | None]:
    """(value, unit, collection time) of an Observation as the feed sent it."""
    q = obs.get("valueQuantity") or {}
    value = q.get("value")
    effective = obs.get("effectiveDateTime") or obs.get("effectiveInstant") \
        or (obs.get("effectivePeriod") or {}).get("start")
    try:
        collected = parse_datetime(effective) if effective else None
    except ValueError:  # an offset-less time read in the lab's zone when stored: order by arrival instead
        collected = None
    shown = None if isinstance(value, bool) or not isinstance(value, int | float) else str(value)
    return (shown, q.get("unit") or q.get("code"), collected)


def _results(session: Session, start: datetime, end: datetime, policy: Policy) -> list[ResultFact]:
    rows = session.execute(
        select(_V.c.last_updated.label("stored_at"), _OBS)
        .select_from(_V.join(_OBS, _OBS.c.id == _V.c.id))
        .where(_V.c.resource_type == "Observation", _V.c.version_id == 1,
               _V.c.last_updated >= start, _V.c.last_updated < end))
    return [ResultFact(r.id, r.patient_key, r.stored_at, _not_evaluated(r, policy)) for r in rows]


def _not_evaluated(r: Any, policy: Policy) -> str | None:
    """The coverage code of the current row, read as the rules read it (the same function ingest uses)."""
    result = LabResult(observation_id=r.id, version=r.version_id, patient=r.patient_key, analyte=Analyte(r.analyte),
                       specimen=Specimen(r.specimen), loinc=r.loinc, status=ResultStatus(r.status),
                       effective=r.effective, value=r.value, comparator=r.comparator, calculated=r.calculated)
    unread = unread_result(result, policy)
    return None if unread is None else unread.code


def _escalations(session: Session, flag_ids: Sequence[str]) -> list[EscalationFact]:
    out: list[EscalationFact] = []
    for ids in _chunks(flag_ids):
        rows = session.execute(select(_ESC.c.flag_id, _ESC.c.round, _ESC.c.escalated_at)
                               .where(_ESC.c.flag_id.in_(list(ids))))
        out += [EscalationFact(fid, int(rnd), at) for fid, rnd, at in rows]
    return sorted(out, key=lambda e: (e.flag_id, e.round))


def _outbox(session: Session, start: datetime, end: datetime) -> list[OutboxFact]:
    tries = (select(_A.c.event_id, func.count().label("n")).group_by(_A.c.event_id).subquery())
    rows = session.execute(
        select(_E.c.id, _E.c.kind, _E.c.status, _E.c.created_at, func.coalesce(tries.c.n, 0))
        .select_from(_E.outerjoin(tries, tries.c.event_id == _E.c.id))
        .where(_E.c.created_at >= start, _E.c.created_at < end).order_by(_E.c.id))
    return [OutboxFact(int(eid), kind, status, at, int(n)) for eid, kind, status, at, n in rows]


def _suspect_drops(session: Session, start: datetime, end: datetime) -> dict[str, int]:
    """Per client, the results dropped under a likely mistyped code (the ``dropped-code`` AuditEvents)."""
    out: dict[str, int] = {}
    for client, body in session.execute(select(_AUDIT.c.client, _AUDIT.c.resource).where(
            _AUDIT.c.subtype == "dropped-code", _AUDIT.c.recorded >= start, _AUDIT.c.recorded < end)):
        event = orjson.loads(body)
        n = sum(int(d["valueString"]) for e in event["entity"] for d in e.get("detail", ()) if d["type"] == "dropped")
        out[str(client)] = out.get(str(client), 0) + n
    return out


def _audit_counts(session: Session, start: datetime, end: datetime) -> dict[str, int]:
    rows = session.execute(select(_AUDIT.c.subtype, func.count()).where(
        _AUDIT.c.recorded >= start, _AUDIT.c.recorded < end).group_by(_AUDIT.c.subtype))
    return {str(subtype): int(n) for subtype, n in rows}


def audit_rows(*, session: Session, start: datetime, end: datetime) -> list[tuple[str, datetime, str, str, int]]:
    """(id, recorded, subtype, client, results dropped) of every AuditEvent recorded in [start, end): the
    rows ``audit_events_by_subtype`` and the dropped-under-suspect-codes figures count."""
    out = []
    for rid, recorded, subtype, client, body in session.execute(
            select(_AUDIT.c.id, _AUDIT.c.recorded, _AUDIT.c.subtype, _AUDIT.c.client, _AUDIT.c.resource)
            .where(_AUDIT.c.recorded >= start, _AUDIT.c.recorded < end)
            .order_by(_AUDIT.c.recorded, _AUDIT.c.id)):
        dropped = 0
        if subtype == "dropped-code":
            event = orjson.loads(body)
            dropped = sum(int(d["valueString"]) for e in event["entity"] for d in e.get("detail", ())
                          if d["type"] == "dropped")
        out.append((str(rid), recorded, str(subtype), str(client), dropped))
    return out
