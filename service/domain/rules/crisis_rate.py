"""Hyperglycaemic crisis corrected too fast: effective osmolality or glucose falling too quickly.

A rate is measured from the latest point of a series back to the latest point of the same kind
drawn at least ``min_hours`` before it (inclusive), and flagged when strictly faster than the
limit. It applies only while the data show a hyperglycaemic crisis at the start of that span
(``service.domain.crisis``: glucose at or above ``starting_glucose_at_least``, 250 mg/dL, compared
exactly in the unit it is written in, a censored ">33.3" counting; and a high effective osmolality
or an insulin infusion running). A ward patient's moderately high glucose falling to normal, with
normal tonicity and no infusion, is not judged by these rules. Suspect results never reach them.

Effective osmolality at a point is the measured serum osmolality when there is one, else 2·Na +
glucose from a sodium and a glucose drawn within the pairing window. A rate is never measured
between a measured and a calculated point: measured osmolality includes urea, so mixing the two
would show a fall that is only the missing urea. Decision support only.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

from service.domain.crisis import crisis_at
from service.domain.derived import corrected_sodium, effective_osmolality, pair_nearest
from service.domain.findings import Finding, Priority, Rule
from service.domain.rules.series import LAB_BLOOD, at_least, exact, fmt, hours, trailing_run_start
from service.domain.values import Analyte, InsulinExposure, LabResult, Specimen
from service.policy.model import Policy

__all__ = ["evaluate_crisis_rate"]


@dataclass(frozen=True, slots=True)
class _Point:
    effective: datetime
    value: float
    kind: str  # "measured" or "calculated"
    results: tuple[LabResult, ...]
    encounter: str | None


def evaluate_crisis_rate(
    results: Sequence[LabResult], exposures: Sequence[InsulinExposure], policy: Policy, patient: str
) -> list[Finding]:
    """Osmolality-fall and glucose-fall findings for one patient's time-ordered, urine-free results."""
    window = timedelta(minutes=policy.derived.pairing_minutes)
    glucose_all = [
        r
        for r in results
        if r.analyte is Analyte.GLUCOSE and r.specimen in policy.crisis.glucose_specimens
    ]
    lab_glucose = exact(r for r in glucose_all if r.specimen in LAB_BLOOD)
    sodium = exact(r for r in results if r.analyte is Analyte.SODIUM and r.specimen in LAB_BLOOD)
    measured = exact(
        r
        for r in results
        if r.analyte is Analyte.OSMOLALITY and r.specimen is Specimen.SERUM_PLASMA and not r.calculated
    )

    osmolality = _osmolality_points(measured, sodium, lab_glucose, window)
    glucose = [
        _Point(g.effective, g.value or 0.0, "measured", (g,), g.encounter) for g in exact(glucose_all)
    ]
    findings = []
    # Measured and calculated osmolality are separate series: a calculated point drawn after the
    # last measured one must not hide a measured fall (nor the reverse). Measured wins when both fire.
    osmolality_series = [[p for p in osmolality if p.kind == kind] for kind in ("measured", "calculated")]
    for rule, series, limit, unit, name in (
        (
            Rule.OSMOLALITY_FALL_TOO_FAST,
            osmolality_series,
            policy.crisis.osmolality_max_fall_per_hour,
            "mOsm/kg",
            "Effective osmolality",
        ),
        (Rule.GLUCOSE_FALL_TOO_FAST, [glucose], policy.crisis.glucose_max_fall_per_hour, "mmol/L", "Glucose"),
    ):
        for points in series:
            finding = _fall(rule, points, limit, unit, name, glucose_all, sodium, results, exposures, policy,
                            patient)
            if finding is not None:
                findings.append(finding)
                break
    return findings


def _osmolality_points(
    measured: Sequence[LabResult],
    sodium: Sequence[LabResult],
    glucose: Sequence[LabResult],
    window: timedelta,
) -> list[_Point]:
    points = [
        _Point(m.effective, m.value or 0.0, "measured", (m,), m.encounter) for m in measured
    ]
    for na in sodium:
        if pair_nearest(na, measured, window) is not None:
            continue  # measured osmolality is present for this draw
        glu = pair_nearest(na, glucose, window)
        value = effective_osmolality(na.value, None if glu is None else glu.value)
        if glu is not None and value is not None:
            points.append(_Point(na.effective, value, "calculated", (na, glu), na.encounter))
    points.sort(key=lambda p: (p.effective, p.kind, tuple(r.observation_id for r in p.results)))
    return points


def _start(points: Sequence[_Point], i: int, min_hours: float) -> _Point | None:
    """The latest earlier point of the same kind drawn at least ``min_hours`` before point i."""
    current = points[i]
    for p in reversed(points[:i]):
        if p.kind == current.kind and hours(p.effective, current.effective) >= min_hours:
            return p
    return None


def _starting_glucose(start: _Point, glucose: Sequence[LabResult], window: timedelta) -> LabResult | None:
    """The glucose for the start of a span: the latest one drawn no later than the pairing window
    after it (the point's own glucose when it is a glucose or a calculated osmolality)."""
    own = [r for r in start.results if r.analyte is Analyte.GLUCOSE]
    if own:
        return own[0]
    earlier = [g for g in glucose if g.effective <= start.effective + window]
    return earlier[-1] if earlier else None


def _fall(
    rule: Rule,
    points: Sequence[_Point],
    limit: float,
    unit: str,
    name: str,
    glucose: Sequence[LabResult],
    sodium: Sequence[LabResult],
    results: Sequence[LabResult],
    exposures: Sequence[InsulinExposure],
    policy: Policy,
    patient: str,
) -> Finding | None:
    crisis = policy.crisis
    window = timedelta(minutes=policy.derived.pairing_minutes)

    def rate(i: int) -> tuple[_Point, float, float] | None:
        start = _start(points, i, crisis.min_hours)
        if start is None:
            return None
        first = _starting_glucose(start, glucose, window)
        if first is None or not at_least(first, crisis.starting_glucose_at_least):
            return None
        span = hours(start.effective, points[i].effective)
        per_hour = (start.value - points[i].value) / span
        if per_hour <= limit:
            return None
        return (start, span, per_hour) if crisis_at(start.effective, results, exposures, policy) else None

    begin = trailing_run_start(len(points), lambda i: rate(i) is not None)
    if begin is None:
        return None
    measured_rate = rate(len(points) - 1)
    assert measured_rate is not None
    start, span, per_hour = measured_rate
    current = points[-1]
    label = name if rule is Rule.GLUCOSE_FALL_TOO_FAST else f"{name} ({current.kind})"
    sentence = (
        f"{label} fell {fmt(start.value - current.value)} {unit} in {fmt(span)} h "
        f"({fmt(per_hour)} {unit}/h), from {fmt(start.value)} to {fmt(current.value)}; "
        f"limit {fmt(limit)} {unit}/h"
    )
    numbers = {
        "fall": start.value - current.value,
        "hours": span,
        "rate_per_hour": per_hour,
        "start": start.value,
        "current": current.value,
        "limit": limit,
    }
    evidence = [r.reference for r in (*start.results, *current.results)]
    corrected = _corrected_sodium_now(current, glucose, sodium, policy)
    if corrected is not None:
        value, na, glu = corrected
        sentence += f"; glucose-corrected sodium {fmt(value)} mmol/L"
        numbers["corrected_sodium"] = value
        evidence += [na.reference, glu.reference]
    return Finding.of(
        rule=rule,
        patient=patient,
        priority=Priority.MEDIUM,
        evidence=evidence,
        numbers=numbers,
        sentence=sentence + ".",
        onset=points[begin].effective,
        encounter=current.encounter,
    )


def _corrected_sodium_now(
    current: _Point, glucose: Sequence[LabResult], sodium: Sequence[LabResult], policy: Policy
) -> tuple[float, LabResult, LabResult] | None:
    """Corrected sodium at the latest point, when a paired glucose there is high."""
    window = timedelta(minutes=policy.derived.pairing_minutes)
    glu = next((r for r in current.results if r.analyte is Analyte.GLUCOSE), None)
    na = next((r for r in current.results if r.analyte is Analyte.SODIUM), None)
    anchor = current.results[0]
    if glu is None:
        glu = pair_nearest(anchor, [g for g in glucose if g.specimen in LAB_BLOOD], window)
    if na is None:
        na = pair_nearest(glu or anchor, sodium, window)
    if glu is None or na is None or glu.value is None or na.value is None:
        return None
    if glu.value < policy.derived.corrected_sodium_from_glucose:
        return None
    return corrected_sodium(na.value, glu.value, policy.derived.sodium_glucose_factor), na, glu
