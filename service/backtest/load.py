"""Stored history as the backtest reads it: the normalised rows, never the FHIR JSON (nothing is
re-validated). Queries only: keyword-only, session first, never commits.

Each result's current version is its ``observation`` row, arriving at the row's ``last_updated``. The
store keeps normalised columns for the current version only, so the earlier versions of a corrected
result (few) are read from the FHIR JSON stored with each (``fhir_version``) and normalised again — never
validated again: each was validated when it was accepted. Each version arrives at its own ``last_updated``.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import replace
from datetime import datetime
from typing import Any

import orjson
from sqlalchemy import and_, select, union
from sqlmodel import Session

from service.backtest.engine import History
from service.db.tables import FhirVersion, InsulinRecord, ObservationRecord
from service.domain.catalogue import lookup
from service.domain.insulin import InsulinCodes
from service.domain.values import Analyte, InsulinExposure, LabResult, ResultStatus, Specimen
from service.fhir.normalise import Invalid, loinc_codes, normalise_insulin, normalise_observation

__all__ = ["histories", "patients_with_arrivals"]

_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]
_INS = InsulinRecord.__table__  # type: ignore[attr-defined]
_V = FhirVersion.__table__  # type: ignore[attr-defined]
_CHUNK = 500  # keeps IN lists well inside every backend's parameter limit
_COLUMNS = ("id", "version_id", "patient_key", "analyte", "specimen", "loinc", "status", "effective", "value",
            "comparator", "calculated", "issued", "encounter", "identifier_system", "identifier_value",
            "quality", "last_updated", "replaces")


def patients_with_arrivals(*, session: Session, since: datetime, before: datetime) -> list[str]:
    """Every patient with a result or insulin record stored in [since, before), sorted."""
    q = union(select(_OBS.c.patient_key).where(_OBS.c.last_updated >= since, _OBS.c.last_updated < before),
              select(_INS.c.patient_key).where(_INS.c.last_updated >= since, _INS.c.last_updated < before))
    return sorted(k for (k,) in session.execute(q))


def histories(*, session: Session, patient_keys: Sequence[str], since: datetime,
              before: datetime) -> list[History]:
    """The histories of these patients: every version stored in [since, before) (the caller starts
    ``since`` one look-back before its range, so the range opens with the Flags already open then)."""
    keys = sorted(set(patient_keys))
    rows = session.execute(
        select(*(_OBS.c[c] for c in _COLUMNS), _V.c.request_id)
        .select_from(_OBS.outerjoin(_V, and_(_V.c.resource_type == "Observation", _V.c.id == _OBS.c.id,
                                             _V.c.version_id == _OBS.c.version_id)))
        .where(_OBS.c.patient_key.in_(keys), _OBS.c.last_updated >= since, _OBS.c.last_updated < before)).all()
    results: dict[str, list[LabResult]] = {k: [] for k in keys}
    replaces: dict[str, dict[str, str]] = {k: {} for k in keys}
    stored: dict[str, list[datetime]] = {k: [] for k in keys}
    units: dict[str, dict[str, int]] = {k: {} for k in keys}
    earlier = _earlier_versions(session, [(r.id, r.version_id) for r in rows if r.version_id > 1])
    for r in rows:
        versions = [*earlier.get(r.id, []), (_result(r), r.replaces, r.request_id)]
        for result, replaced, unit in versions:
            result = replace(result, patient=r.patient_key)
            results[r.patient_key].append(result)
            units[r.patient_key][result.reference] = unit or 0
            if replaced:
                replaces[r.patient_key][result.reference] = replaced
        stored[r.patient_key].append(min(v.arrived or r.last_updated for v, _, _ in versions))
    exposures: dict[str, list[tuple[datetime, InsulinExposure]]] = {k: [] for k in keys}
    ins_rows = session.execute(
        select(_INS, _V.c.request_id)
        .select_from(_INS.outerjoin(_V, and_(_V.c.resource_type == "MedicationAdministration",
                                             _V.c.id == _INS.c.id, _V.c.version_id == _INS.c.version_id)))
        .where(_INS.c.patient_key.in_(keys), _INS.c.last_updated >= since, _INS.c.last_updated < before)).all()
    earlier_ins = _earlier_insulin(session, [(x.id, x.version_id, x.medication) for x in ins_rows
                                             if x.version_id > 1])
    for x in ins_rows:
        current = InsulinExposure(source_id=x.id, version=x.version_id, patient=x.patient_key, start=x.start,
                                  end=x.end, route=x.route, status=x.status, medication=x.medication)
        for at, exposure, unit in [*earlier_ins.get(x.id, []), (x.last_updated, current, x.request_id)]:
            exposure = replace(exposure, patient=x.patient_key)
            exposures[x.patient_key].append((at, exposure))
            units[x.patient_key][exposure.reference] = unit or 0
    return [History(patient=k, results=tuple(results[k]), replaces=replaces[k], exposures=tuple(exposures[k]),
                    stored=tuple(sorted(stored[k])), units=units[k]) for k in keys]


def _result(r: Any) -> LabResult:
    return LabResult(
        observation_id=r.id, version=r.version_id, patient=r.patient_key, analyte=Analyte(r.analyte),
        specimen=Specimen(r.specimen), loinc=r.loinc, status=ResultStatus(r.status),
        effective=r.effective, value=r.value, comparator=r.comparator, calculated=r.calculated,
        issued=r.issued, encounter=r.encounter, key=f"{r.identifier_system}|{r.identifier_value}",
        quality=r.quality, arrived=r.last_updated,
    )


def _versions(session: Session, rtype: str, ids: Sequence[str]
              ) -> Iterator[tuple[str, int, datetime, bytes, int | None]]:
    for i in range(0, len(ids), _CHUNK):
        chunk = list(ids[i : i + _CHUNK])
        for row in session.execute(select(_V.c.id, _V.c.version_id, _V.c.last_updated, _V.c.resource,
                                          _V.c.request_id).where(_V.c.resource_type == rtype, _V.c.id.in_(chunk))):
            yield row.id, row.version_id, row.last_updated, row.resource, row.request_id


def _earlier_versions(session: Session, current: Sequence[tuple[str, int]]
                      ) -> dict[str, list[tuple[LabResult, str | None, int | None]]]:
    """The versions before the current one of each corrected result, read from the FHIR JSON stored when
    each was accepted (already validated then: normalised again, not validated again)."""
    newest = dict(current)
    out: dict[str, list[tuple[LabResult, str | None, int | None]]] = {}
    for rid, version, written, body, unit in _versions(session, "Observation", sorted(newest)):
        if version >= newest[rid]:
            continue
        resource = orjson.loads(body)
        entry = next((e for code in loinc_codes(resource) if (e := lookup(code)) is not None), None)
        if entry is None:
            continue  # that version was under a code we no longer watch: the live path did not read it either
        try:
            o = normalise_observation(resource, entry, "Observation")
        except Invalid:
            continue
        out.setdefault(rid, []).append((LabResult(
            observation_id=rid, version=version, patient="", analyte=entry.analyte, specimen=entry.specimen,
            loinc=entry.code, status=ResultStatus(o.status), effective=o.effective, value=o.value,
            comparator=o.comparator, calculated=entry.calculated, issued=o.issued, encounter=o.encounter,
            key=f"{o.identifier[0]}|{o.identifier[1]}", quality=o.quality, arrived=written), o.replaces, unit))
    return out


def _earlier_insulin(session: Session, current: Sequence[tuple[str, int, str]]
                     ) -> dict[str, list[tuple[datetime, InsulinExposure, int | None]]]:
    """The earlier versions of each corrected insulin record, read as :func:`_earlier_versions` reads results."""
    newest = {rid: (version, medication) for rid, version, medication in current}
    out: dict[str, list[tuple[datetime, InsulinExposure, int | None]]] = {}
    for rid, version, written, body, unit in _versions(session, "MedicationAdministration", sorted(newest)):
        top, medication = newest[rid]
        if version >= top:
            continue
        try:
            x = normalise_insulin(orjson.loads(body), InsulinCodes(codes=frozenset({medication})), "")
        except Invalid:
            continue
        if x is None:
            continue
        out.setdefault(rid, []).append((written, InsulinExposure(
            source_id=rid, version=version, patient="", start=x.start, end=x.end, route=x.route,
            status=x.status, medication=x.medication), unit))
    return out
