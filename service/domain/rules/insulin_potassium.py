"""Hypokalaemia persisting while insulin is being given.

Insulin therapy counts when a MedicationAdministration on one of the policy's routes (default:
intravenous only) is active at ``now``: from its start until its end plus ``iv_tail_minutes``, or
open-ended while it has no end. Subcutaneous doses are not counted by default: a dose is a moment
with no infusion to stop, and its action depends on the preparation, which the data do not give
reliably; a site can add the route. Administrations recorded as not done or entered in error never
count.

The latest potassium that proves a side decides. When it is strictly below ``below`` (3.5) and insulin
is active at ``now``, a finding is raised when EITHER
  - it is the second (or later) consecutive low result, drawn during an administration and at least
    ``persistence_min_gap_minutes`` (inclusive) after the first low of the run; OR
  - no newer potassium has been drawn for strictly more than ``recheck_hours`` before ``now``.
The second case depends on time alone, so a later ``now`` can raise it. A potassium strictly below
``escalate_below`` (3.0) anywhere in the run makes it high priority. It resolves when a newer
potassium is at or above ``below`` or no counted administration is active at ``now``.
Decision support only: the sentence describes the data, it does not prescribe.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta

from service.domain.findings import Finding, Priority, Rule
from service.domain.rules.series import Verdict, below, fmt, hours, trailing_run_start
from service.domain.values import Analyte, InsulinExposure, LabResult
from service.policy.model import InsulinPotassium, Policy

__all__ = ["evaluate_insulin_potassium", "exposure_active"]

_NEVER_GIVEN = frozenset({"not-done", "entered-in-error"})


def exposure_active(exposure: InsulinExposure, at: datetime, rules: InsulinPotassium) -> bool:
    """Whether the administration counts as insulin therapy at ``at`` (both ends inclusive)."""
    if exposure.status in _NEVER_GIVEN or exposure.route not in rules.routes:
        return False
    if exposure.end is None:
        return exposure.start <= at
    return exposure.start <= at <= exposure.end + timedelta(minutes=rules.iv_tail_minutes)


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
    start = trailing_run_start(len(informative), lambda i: informative[i][1] is Verdict.DANGER)
    if start is None:
        return []
    run = [r for r, _ in informative[start:]]
    first, latest = run[0], run[-1]
    during = any(exposure_active(e, latest.effective, rules) for e in exposures)
    persistent = (
        len(run) >= 2
        and during
        and hours(first.effective, latest.effective) * 60.0 >= rules.persistence_min_gap_minutes
    )
    overdue = hours(latest.effective, now) > rules.recheck_hours
    if not (persistent or overdue):
        return []

    escalate = any(below(r, rules.escalate_below) is Verdict.DANGER for r in run)
    shown = f"{latest.comparator or ''}{fmt(latest.value or 0.0)}"
    parts = [f"Potassium {shown} mmol/L, below {fmt(rules.below)} mmol/L, while insulin is being given"]
    if persistent:
        parts.append(
            f"{len(run)} consecutive results below {fmt(rules.below)} over "
            f"{fmt(hours(first.effective, latest.effective))} h"
        )
    if overdue:
        # Worded without the wall clock, so the sentence stays the same on every later evaluation.
        parts.append(f"no newer potassium within the {fmt(rules.recheck_hours)} h recheck interval")
    return [
        Finding.of(
            rule=Rule.HYPOKALEMIA_ON_INSULIN,
            patient=patient,
            priority=Priority.HIGH if escalate else Priority.MEDIUM,
            evidence=[r.reference for r in run] + [e.reference for e in active],
            numbers={
                "potassium": latest.value or 0.0,
                "threshold": rules.below,
                "consecutive_low": float(len(run)),
                "hours_low": hours(first.effective, latest.effective),
                "recheck_hours": rules.recheck_hours,
                "recheck_overdue": 1.0 if overdue else 0.0,
                "escalated": 1.0 if escalate else 0.0,
            },
            sentence="; ".join(parts) + ".",
            onset=first.effective,
            encounter=latest.encounter,
        )
    ]
