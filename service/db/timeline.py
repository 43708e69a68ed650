"""A patient's timeline: what the rules read. One indexed query per table, ordered by effective time."""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import or_, select
from sqlmodel import Session

from service.db.tables import InsulinRecord, ObservationRecord
from service.domain.values import Analyte, InsulinExposure, LabResult, ResultStatus, Specimen, Timeline

__all__ = ["load_timeline"]

_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]
_INS = InsulinRecord.__table__  # type: ignore[attr-defined]

# Results that can never feed a rule: withdrawn, never measured, or not yet resulted.
_UNUSABLE = (ResultStatus.ENTERED_IN_ERROR, ResultStatus.CANCELLED, ResultStatus.REGISTERED)
_EXPOSURE_UNUSABLE = ("entered-in-error", "not-done")


def load_timeline(*, session: Session, patient_key: str, end: datetime, lookback: timedelta) -> Timeline:
    """Current usable results and insulin exposures of one patient inside (end - lookback, end].

    Results named by another result's observation-replaces extension are left out wherever the
    replacing one arrived from, so the outcome does not depend on arrival order.
    """
    start = end - lookback
    rows = session.execute(
        select(_OBS)
        .where(
            _OBS.c.patient_key == patient_key,
            _OBS.c.effective > start,
            _OBS.c.effective <= end,
        )
        .order_by(_OBS.c.effective, _OBS.c.id)
    ).all()
    replaced = {r.replaces for r in rows if r.replaces and r.status != ResultStatus.ENTERED_IN_ERROR}
    results = tuple(
        LabResult(
            observation_id=r.id,
            version=r.version_id,
            patient=r.patient_key,
            analyte=Analyte(r.analyte),
            specimen=Specimen(r.specimen),
            loinc=r.loinc,
            status=ResultStatus(r.status),
            effective=r.effective,
            value=r.value,
            comparator=r.comparator,
            calculated=r.calculated,
            issued=r.issued,
            encounter=r.encounter,
        )
        for r in rows
        if r.status not in _UNUSABLE
        and r.value is not None
        and f"Observation/{r.id}" not in replaced
        and f"id:{r.identifier_system}|{r.identifier_value}" not in replaced
    )
    exposures = tuple(
        InsulinExposure(
            source_id=x.id,
            version=x.version_id,
            patient=x.patient_key,
            start=x.start,
            end=x.end,
            route=x.route,
            status=x.status,
            medication=x.medication,
        )
        for x in session.execute(
            select(_INS)
            .where(
                _INS.c.patient_key == patient_key,
                _INS.c.start <= end,
                or_(_INS.c.end.is_(None), _INS.c.end > start),
            )
            .order_by(_INS.c.start, _INS.c.id)
        ).all()
        if x.status not in _EXPOSURE_UNUSABLE
    )
    return Timeline(patient=patient_key, window_start=start, window_end=end, results=results, exposures=exposures)
