"""Which Flag versions page the responder topic. Pure: no I/O, no clock.

Every Flag version is kept and goes on flag-changed for integrations. Responders are paged (topic
flag-alert) only for what they must act on: a Flag raised (created or reactivated), a rise in
priority, a worsening of the rule's measure by at least the policy step since the LAST version that
paged (so a creeping worsening still pages once it adds up to a step), closed and withdrawn.

Each rule is measured by one of its Finding numbers, with the direction that is worse. A rule with
no measure here, or a finding without its number, pages on every version: when in doubt, page.
Decision support only: the steps are site policy.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum
from types import MappingProxyType
from typing import Literal

from service.domain.findings import Priority, Rule
from service.domain.values import Analyte
from service.policy.model import AlertingPolicy

__all__ = ["MEASURES", "Change", "Measure", "Paged", "Reason", "Worse", "measure_of", "page_reason"]

# How a Flag version came to be (the flag writer's kinds).
Change = Literal["create", "reactivate", "update", "close", "withdraw"]

# Tolerance for sums of decimal steps (117.5 → 116 is 2 in decimal, 1.9999… in binary floating point).
_EPSILON = 1e-9
_RANK = {Priority.LOW: 1, Priority.MEDIUM: 2, Priority.HIGH: 3}


class Worse(StrEnum):
    HIGHER = "higher"
    LOWER = "lower"


@dataclass(frozen=True, slots=True)
class Measure:
    """The Finding number a rule is judged by, which way is worse, and whose step applies."""

    number: str
    worse: Worse
    analyte: Analyte
    per_hour: bool = False  # a rate: the policy's per-hour step applies


def _level(analyte: Analyte, worse: Worse) -> Measure:
    # Further beyond the limit is worse: lower for a low limit, higher for a high one.
    return Measure("value", worse, analyte)


MEASURES: Mapping[Rule, Measure] = MappingProxyType({
    Rule.SODIUM_CRITICAL_LOW: _level(Analyte.SODIUM, Worse.LOWER),
    Rule.SODIUM_CRITICAL_HIGH: _level(Analyte.SODIUM, Worse.HIGHER),
    Rule.POTASSIUM_CRITICAL_LOW: _level(Analyte.POTASSIUM, Worse.LOWER),
    Rule.POTASSIUM_CRITICAL_HIGH: _level(Analyte.POTASSIUM, Worse.HIGHER),
    Rule.GLUCOSE_CRITICAL_LOW: _level(Analyte.GLUCOSE, Worse.LOWER),
    Rule.GLUCOSE_CRITICAL_HIGH: _level(Analyte.GLUCOSE, Worse.HIGHER),
    Rule.OSMOLALITY_CRITICAL_LOW: _level(Analyte.OSMOLALITY, Worse.LOWER),
    Rule.OSMOLALITY_CRITICAL_HIGH: _level(Analyte.OSMOLALITY, Worse.HIGHER),
    # The rise from the nadir (mmol/L), for the crossed limit and the projection alike.
    Rule.SODIUM_RISE_TOO_FAST: Measure("rise", Worse.HIGHER, Analyte.SODIUM),
    Rule.SODIUM_RISE_PROJECTED: Measure("rise", Worse.HIGHER, Analyte.SODIUM),
    # The fall from the 24 h peak (mmol/L): always present, unlike the rate, which only the
    # sustained-rate form of the finding carries.
    Rule.SODIUM_FALL_TOO_FAST: Measure("fall", Worse.HIGHER, Analyte.SODIUM),
    Rule.SODIUM_FALL_IN_CRISIS: Measure("fall", Worse.HIGHER, Analyte.SODIUM),
    Rule.OSMOLALITY_FALL_TOO_FAST: Measure("rate_per_hour", Worse.HIGHER, Analyte.OSMOLALITY, per_hour=True),
    Rule.GLUCOSE_FALL_TOO_FAST: Measure("rate_per_hour", Worse.HIGHER, Analyte.GLUCOSE, per_hour=True),
    Rule.HYPOKALEMIA_ON_INSULIN: Measure("potassium", Worse.LOWER, Analyte.POTASSIUM),
})


@dataclass(frozen=True, slots=True)
class Paged:
    """What the responder topic last carried for a Flag (None: nothing recorded)."""

    priority: Priority | None
    measure: float | None


class Reason(StrEnum):
    """Why a version pages."""

    RAISED = "raised"
    PRIORITY_ROSE = "priority-rose"
    WORSENED = "worsened"
    CLOSED = "closed"
    WITHDRAWN = "withdrawn"
    UNMEASURED = "unmeasured"  # no measure, or nothing recorded to compare with: page to be safe

    @property
    def reopens_escalation(self) -> bool:
        """A page that asks for a fresh acknowledgement: an older one no longer covers the Flag."""
        return self in (Reason.RAISED, Reason.PRIORITY_ROSE)


def _lookup(rule: Rule | str, measures: Mapping[Rule, Measure]) -> Measure | None:
    try:
        return measures.get(Rule(rule))
    except ValueError:  # a rule code this build does not know
        return None


def measure_of(rule: Rule | str, numbers: Mapping[str, float],
               measures: Mapping[Rule, Measure] = MEASURES) -> float | None:
    """The value of the rule's measure in these numbers, if the rule has one and the number is there."""
    measure = _lookup(rule, measures)
    if measure is None or measure.number not in numbers:
        return None
    return float(numbers[measure.number])


def page_reason(
    *,
    change: Change,
    rule: Rule | str,
    priority: Priority,
    numbers: Mapping[str, float],
    last: Paged,
    steps: AlertingPolicy,
    measures: Mapping[Rule, Measure] = MEASURES,
) -> Reason | None:
    """Why this Flag version pages the responder topic, or None when it is for the record only.

    ``last`` is what the responder topic last carried for this Flag; ``priority`` and ``numbers``
    are the new version's.
    """
    if change in ("create", "reactivate"):
        return Reason.RAISED
    if change == "close":
        return Reason.CLOSED
    if change == "withdraw":
        return Reason.WITHDRAWN
    if last.priority is None:
        return Reason.UNMEASURED
    if _RANK[priority] > _RANK[last.priority]:
        return Reason.PRIORITY_ROSE
    measure = _lookup(rule, measures)
    now = measure_of(rule, numbers, measures)
    if measure is None or now is None or last.measure is None:
        return Reason.UNMEASURED
    step = steps.step(measure.analyte, per_hour=measure.per_hour)
    if step is None:
        return Reason.UNMEASURED
    worsening = now - last.measure if measure.worse is Worse.HIGHER else last.measure - now
    return Reason.WORSENED if worsening >= step - _EPSILON else None
