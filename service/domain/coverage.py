"""Which stored results and insulin administrations no rule can read, and why.

A result can be stored (it is a watched LOINC code, kept for the record and for corrections) and still
never reach a rule: not yet resulted, never measured, withdrawn, without a number, a urine specimen, a
calculated value, an analyte or specimen no rule of the site policy reads. Saying so is the
difference between "stored and judged" and "stored and ignored"; the ingest answer and the
informatics summary both use this function, so they cannot disagree.

This mirrors what the timeline query (service/db/timeline.py) and the rule families
(service/domain/rules/) select. tests/domain/test_arrival.py checks it against ``evaluate`` both ways:
a result called unread never changes a finding, and a result called readable is cited by one at an
extreme value. Pure; decision support only.
"""

from __future__ import annotations

from dataclasses import dataclass

from service.domain.values import Analyte, InsulinExposure, LabResult, ResultStatus, Specimen
from service.policy.model import Policy

__all__ = ["Unread", "read_specimens", "unread_exposure", "unread_result"]

# Laboratory blood: the specimens the rate and risk rules read whatever the policy lists
# (service.domain.rules.series.LAB_BLOOD).
_LAB_BLOOD = (Specimen.SERUM_PLASMA, Specimen.WHOLE_BLOOD)


@dataclass(frozen=True, slots=True)
class Unread:
    """Why something stored is not evaluated: a stable ``code`` for counting and a ``reason`` to read."""

    code: str
    reason: str


_STATUS = {
    ResultStatus.REGISTERED: Unread("status-registered", "status registered: not yet resulted; the result "
                                    "is evaluated when a version with a value arrives"),
    ResultStatus.CANCELLED: Unread("status-cancelled", "status cancelled: the test was not done"),
    ResultStatus.ENTERED_IN_ERROR: Unread("entered-in-error", "entered in error: withdrawn, nothing is judged "
                                          "on it; an active Flag, or the Flag of a late result, resting only "
                                          "on withdrawn results is withdrawn"),
}
_NO_VALUE = Unread("no-numeric-value", "no numeric value (valueQuantity.value): no rule can read it; "
                   "send the number, or a dataAbsentReason if there is none")
_URINE = Unread("urine", "urine specimen: the rules judge blood and serum only")
_CALCULATED = Unread("calculated", "calculated value: the rules read measured osmolality only")
_UREA = Unread("analyte-not-read", "no rule reads urea: stored for the record")
_CALCIUM = Unread("context-only", "calcium is context only: read beside a high potassium as a sign of "
                  "K2EDTA contamination; no rule flags calcium itself")


def read_specimens(analyte: Analyte, policy: Policy) -> frozenset[Specimen]:
    """The specimens in which some rule reads a measured ``analyte`` under ``policy``."""
    levels = {s for lim in policy.levels if lim.analyte is analyte for s in lim.specimens}
    if analyte is Analyte.SODIUM:
        # Sodium-rate rules read the policy's sodium specimens; the crisis rules lab blood.
        return frozenset(levels | set(policy.sodium.specimens) | set(_LAB_BLOOD))
    if analyte is Analyte.POTASSIUM:
        # Insulin-potassium reads its own specimens; the sodium-rise high-risk check lab blood.
        return frozenset(levels | set(policy.insulin_potassium.specimens) | set(_LAB_BLOOD))
    if analyte is Analyte.GLUCOSE:
        # Crisis rates read the policy's glucose specimens; corrected sodium pairs with lab blood.
        return frozenset(levels | set(policy.crisis.glucose_specimens) | set(_LAB_BLOOD))
    if analyte is Analyte.OSMOLALITY:
        return frozenset(levels | {Specimen.SERUM_PLASMA})  # the crisis rules: measured serum
    return frozenset()


def unread_result(result: LabResult, policy: Policy) -> Unread | None:
    """Why no rule can read this result version, or None when some rule does."""
    status = _STATUS.get(result.status)
    if status is not None:
        return status
    if result.value is None:
        return _NO_VALUE
    if result.specimen is Specimen.URINE:
        return _URINE
    if result.analyte is Analyte.UREA:
        return _UREA
    if result.analyte is Analyte.CALCIUM:
        return _CALCIUM
    if result.calculated:
        return _CALCULATED
    if result.specimen not in read_specimens(result.analyte, policy):
        return Unread("specimen-not-read", f"no rule of the site policy reads {result.analyte.value} in "
                      f"{result.specimen.value} specimens")
    return None


def unread_exposure(exposure: InsulinExposure, policy: Policy) -> Unread | None:
    """Why the insulin-potassium rule never counts this administration, or None when it may."""
    if exposure.status == "entered-in-error":
        return Unread("entered-in-error", "entered in error: withdrawn; a Flag resting on it is withdrawn")
    if exposure.status == "not-done":
        return Unread("not-given", "status not-done: the insulin was not given")
    routes = policy.insulin_potassium.routes
    if exposure.route not in routes:
        route = exposure.route or "not stated"
        return Unread("route-not-counted", f"route {route}: the site policy counts insulin given by "
                      f"{', '.join(routes)} only (insulin_potassium.routes)")
    return None
