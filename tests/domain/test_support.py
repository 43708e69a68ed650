"""Builders for the domain tests (no tests here). All data invented; no real patients."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from itertools import count

from service.domain.values import (
    Analyte,
    InsulinExposure,
    LabResult,
    ResultStatus,
    Specimen,
    Timeline,
)
from service.policy import Policy, load_policy

T0 = datetime(2024, 3, 1, 8, 0, tzinfo=UTC)
PATIENT = "pat-1"
MG_DL_PER_MMOL_L = 18.0156  # glucose, M = 180.156 g/mol

_ids = count(1)
_LOINC = {
    Analyte.SODIUM: "2951-2",
    Analyte.POTASSIUM: "2823-3",
    Analyte.GLUCOSE: "14749-6",
    Analyte.OSMOLALITY: "2692-2",
    Analyte.UREA: "22664-7",
    Analyte.CALCIUM: "2000-8",
}


def at(h: float) -> datetime:
    """The time ``h`` hours after the test epoch."""
    return T0 + timedelta(hours=h)


def lab(
    analyte: Analyte,
    value: float | None,
    h: float,
    specimen: Specimen = Specimen.SERUM_PLASMA,
    comparator: str | None = None,
    obs_id: str | None = None,
    calculated: bool = False,
) -> LabResult:
    return LabResult(
        observation_id=obs_id or f"obs-{next(_ids)}",
        version=1,
        patient=PATIENT,
        analyte=analyte,
        specimen=specimen,
        loinc=_LOINC[analyte],
        status=ResultStatus.FINAL,
        effective=at(h),
        value=value,
        comparator=comparator,
        calculated=calculated,
        encounter="enc-1",
    )


def na(value: float, h: float, **kw: object) -> LabResult:
    return lab(Analyte.SODIUM, value, h, **kw)  # type: ignore[arg-type]


def k(value: float, h: float, **kw: object) -> LabResult:
    return lab(Analyte.POTASSIUM, value, h, **kw)  # type: ignore[arg-type]


def glu(value: float, h: float, **kw: object) -> LabResult:
    return lab(Analyte.GLUCOSE, value, h, **kw)  # type: ignore[arg-type]


def osm(value: float, h: float, **kw: object) -> LabResult:
    return lab(Analyte.OSMOLALITY, value, h, **kw)  # type: ignore[arg-type]


def insulin(
    start_h: float,
    end_h: float | None = None,
    route: str | None = "intravenous",
    status: str = "in-progress",
    source_id: str | None = None,
) -> InsulinExposure:
    return InsulinExposure(
        source_id=source_id or f"ma-{next(_ids)}",
        version=1,
        patient=PATIENT,
        start=at(start_h),
        end=None if end_h is None else at(end_h),
        route=route,
        status=status,
        medication="http://www.whocc.no/atc|A10AB01",
    )


def timeline(
    results: list[LabResult] | tuple[LabResult, ...] = (),
    exposures: list[InsulinExposure] | tuple[InsulinExposure, ...] = (),
) -> Timeline:
    """A Timeline as its contract promises: results sorted by effective time then id."""
    ordered = tuple(sorted(results, key=lambda r: (r.effective, r.observation_id)))
    return Timeline(
        patient=PATIENT,
        window_start=at(-72),
        window_end=at(72),
        results=ordered,
        exposures=tuple(exposures),
    )


def policy(**section_overrides: dict[str, object]) -> Policy:
    """The packaged default policy, with some section fields replaced (e.g. sodium={...})."""
    base = load_policy()
    updates = {}
    for section, fields in section_overrides.items():
        updates[section] = getattr(base, section).model_copy(update=fields)
    return base.model_copy(update=updates)
