"""Low potassium while insulin is being given, raised the moment the data show it.

Insulin moves potassium into cells, so a low potassium during insulin therapy can fall further
quickly. Insulin therapy counts as described in ``service.domain.insulin_exposure`` (default: IV
only). Whenever counted insulin is active at ``now`` and the latest potassium that proves a side is
strictly below ``below`` (3.5), a finding is raised at once, whether the potassium was drawn before
the insulin started or during it. Its priority is HIGH when any of these holds, else MEDIUM:
  - the latest potassium is strictly below ``hold_below`` (3.3): guidelines advise holding insulin
    until potassium is at least that (Kitabchi AE et al, Diabetes Care 2009;32:1335-1343); the
    sentence says so in neutral words;
  - any potassium of the current low run is strictly below ``escalate_below`` (3.0);
  - it is the second (or later) consecutive low result, drawn during insulin and at least
    ``persistence_min_gap_minutes`` after the first low of the run;
  - no newer potassium has been drawn for strictly more than ``recheck_hours`` before ``now``
    (time alone can raise this, so a later ``now`` can raise the priority).
Results drawn at the same instant are judged together: if any of them is low, the instant is low.
It resolves when a newer potassium is at or above ``below`` or no counted insulin is active at
``now``. Decision support only: the sentence describes the data and what guidelines say; it does
not prescribe.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from itertools import groupby

from service.domain.findings import Finding, Priority, Rule
from service.domain.insulin_exposure import exposure_active
from service.domain.rules.series import Verdict, below, fmt, hours, shown, trailing_run_start
from service.domain.values import Analyte, InsulinExposure, LabResult
from service.policy.model import Policy

__all__ = ["evaluate_insulin_potassium"]


def evaluate_insulin_potassium(
    results: Sequence[LabResult],
    exposures: Sequence[InsulinExposure],
    policy: Policy,
    patient: str,
    now: datetime,
) -> list[Finding]:
    rules = policy.insulin_potassium
    active = [e for e in exposures if exposure_active(e, now, rules)]
    if not active:
        return []
    informative = [
        (r, verdict)
        for r in results
        if r.analyte is Analyte.POTASSIUM
        and r.specimen in rules.specimens
        and (verdict := below(r, rules.below)) is not Verdict.UNKNOWN
    ]
    # One verdict per instant: a low and a normal potassium drawn at the same moment count as low.
    instants = [
        (list(group), any(v is Verdict.DANGER for _, v in group))
        for _, grouped in groupby(informative, key=lambda item: item[0].effective)
        for group in [list(grouped)]
    ]
    start = trailing_run_start(len(instants), lambda i: instants[i][1])
    if start is None:
        return []
    run = [r for group, _ in instants[start:] for r, v in group if v is Verdict.DANGER]
    first, latest = run[0], min(instants[-1][0], key=lambda item: item[0].value or 0.0)[0]

    hold = below(latest, rules.hold_below) is Verdict.DANGER
    very_low = any(below(r, rules.escalate_below) is Verdict.DANGER for r in run)
    during = any(exposure_active(e, latest.effective, rules) for e in exposures)
    low_instants = len(instants) - start
    persistent = (
        low_instants >= 2
        and during
        and hours(first.effective, latest.effective) * 60.0 >= rules.persistence_min_gap_minutes
    )
    overdue = hours(latest.effective, now) > rules.recheck_hours
    high = hold or very_low or persistent or overdue

    started = min(e.start for e in active)
    parts = [f"Potassium {shown(latest)}, below {fmt(rules.below)} mmol/L, while insulin is being given"]
    if started > latest.effective:
        parts[0] += f" (insulin started {_duration(latest.effective, started)} after this result)"
    if hold:
        parts.append(
            f"guidelines advise holding insulin until potassium is at least {fmt(rules.hold_below)} mmol/L"
        )
    if very_low and not hold:
        parts.append(f"a result below {fmt(rules.escalate_below)} mmol/L")
    if persistent:
        parts.append(
            f"{low_instants} consecutive results below {fmt(rules.below)} over "
            f"{fmt(hours(first.effective, latest.effective))} h"
        )
    if overdue:
        # Worded without the wall clock, so the sentence stays the same on every later evaluation.
        parts.append(f"no newer potassium within the {fmt(rules.recheck_hours)} h recheck interval")
    return [
        Finding.of(
            rule=Rule.HYPOKALEMIA_ON_INSULIN,
            patient=patient,
            priority=Priority.HIGH if high else Priority.MEDIUM,
            evidence=[r.reference for r in run] + [e.reference for e in active],
            numbers={
                "potassium": latest.value or 0.0,
                "threshold": rules.below,
                "hold_below": rules.hold_below,
                "below_hold": 1.0 if hold else 0.0,
                "consecutive_low": float(low_instants),
                "hours_low": hours(first.effective, latest.effective),
                "recheck_hours": rules.recheck_hours,
                "recheck_overdue": 1.0 if overdue else 0.0,
                "escalated": 1.0 if high else 0.0,
            },
            sentence="; ".join(parts) + ".",
            onset=first.effective,
            encounter=latest.encounter,
        )
    ]


def _duration(start: datetime, end: datetime) -> str:
    minutes = round((end - start).total_seconds() / 60.0)
    if minutes < 120:
        return f"{minutes} min"
    return f"{fmt(minutes / 60.0)} h"
