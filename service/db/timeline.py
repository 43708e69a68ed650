"""A patient's timeline: what the rules read. One indexed query per table, ordered by effective time."""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime, timedelta

from sqlalchemy import or_, select
from sqlmodel import Session

from service.db.tables import InsulinRecord, ObservationRecord
from service.domain.values import Analyte, InsulinExposure, LabResult, ResultStatus, Specimen, Timeline

__all__ = ["load_timeline", "load_timelines"]

_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]
_INS = InsulinRecord.__table__  # type: ignore[attr-defined]

# Results that can never feed a rule: withdrawn, never measured, or not yet resulted.
_UNUSABLE = (ResultStatus.ENTERED_IN_ERROR, ResultStatus.CANCELLED, ResultStatus.REGISTERED)
_EXPOSURE_UNUSABLE = ("entered-in-error", "not-done")


def load_timeline(*, session: Session, patient_key: str, end: datetime, lookback: timedelta) -> Timeline:
    """One patient's timeline: current usable results and insulin exposures in (end - lookback, end]."""
    return load_timelines(session=session, patient_keys=[patient_key], end=end, lookback=lookback)[patient_key]


def load_timelines(
    *, session: Session, patient_keys: Iterable[str], end: datetime, lookback: timedelta
) -> dict[str, Timeline]:
    """Timelines of several patients from one indexed query per table.

    Results named by another result's observation-replaces extension are left out wherever the
    replacing one arrived from, so the outcome does not depend on arrival order.
    """
    keys = sorted(set(patient_keys))
    start = end - lookback
    rows = session.execute(
        select(_OBS)
        .where(_OBS.c.patient_key.in_(keys), _OBS.c.effective > start, _OBS.c.effective <= end)
        .order_by(_OBS.c.patient_key, _OBS.c.effective, _OBS.c.id)
    ).all()
    exposure_rows = session.execute(
        select(_INS)
        .where(_INS.c.patient_key.in_(keys), _INS.c.start <= end,
               or_(_INS.c.end.is_(None), _INS.c.end > start))
        .order_by(_INS.c.patient_key, _INS.c.start, _INS.c.id)
    ).all()
    replaced = {r.replaces for r in rows if r.replaces and r.status != ResultStatus.ENTERED_IN_ERROR}
    results: dict[str, list[LabResult]] = {k: [] for k in keys}
    withdrawn: dict[str, set[str]] = {k: set() for k in keys}
    for r in rows:
        if r.status == ResultStatus.ENTERED_IN_ERROR:
            withdrawn[r.patient_key].add(f"Observation/{r.id}")
        if (r.status in _UNUSABLE or r.value is None or f"Observation/{r.id}" in replaced
                or f"id:{r.identifier_system}|{r.identifier_value}" in replaced):
            continue
        results[r.patient_key].append(LabResult(
            observation_id=r.id, version=r.version_id, patient=r.patient_key, analyte=Analyte(r.analyte),
            specimen=Specimen(r.specimen), loinc=r.loinc, status=ResultStatus(r.status),
            effective=r.effective, value=r.value, comparator=r.comparator, calculated=r.calculated,
            issued=r.issued, encounter=r.encounter, key=f"{r.identifier_system}|{r.identifier_value}",
            quality=r.quality, arrived=r.last_updated, sent_value=r.sent_value, sent_unit=r.sent_unit,
        ))
    exposures: dict[str, list[InsulinExposure]] = {k: [] for k in keys}
    for x in exposure_rows:
        if x.status == "entered-in-error":
            withdrawn[x.patient_key].add(f"MedicationAdministration/{x.id}")
        if x.status in _EXPOSURE_UNUSABLE:
            continue
        exposures[x.patient_key].append(InsulinExposure(
            source_id=x.id, version=x.version_id, patient=x.patient_key, start=x.start, end=x.end,
            route=x.route, status=x.status, medication=x.medication,
        ))
    for k in keys:
        results[k].sort(key=lambda r: r.order_key)
    return {
        k: Timeline(patient=k, window_start=start, window_end=end, results=tuple(results[k]),
                    exposures=tuple(exposures[k]), withdrawn=frozenset(withdrawn[k]))
        for k in keys
    }
