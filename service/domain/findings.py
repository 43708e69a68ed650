"""What a rule found: a plain value the flag layer turns into a FHIR Flag.

Decision support only: a finding describes what the results show; it never prescribes treatment.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import StrEnum
from types import MappingProxyType

__all__ = ["Finding", "Priority", "Rule", "episode_key"]


class Rule(StrEnum):
    """Our rule codes: plain names for what each rule detects."""

    SODIUM_CRITICAL_LOW = "sodium-critical-low"
    SODIUM_CRITICAL_HIGH = "sodium-critical-high"
    POTASSIUM_CRITICAL_LOW = "potassium-critical-low"
    POTASSIUM_CRITICAL_HIGH = "potassium-critical-high"
    GLUCOSE_CRITICAL_LOW = "glucose-critical-low"
    GLUCOSE_CRITICAL_HIGH = "glucose-critical-high"
    OSMOLALITY_CRITICAL_LOW = "osmolality-critical-low"
    OSMOLALITY_CRITICAL_HIGH = "osmolality-critical-high"
    SODIUM_RISE_TOO_FAST = "sodium-rise-too-fast"
    SODIUM_RISE_PROJECTED = "sodium-rise-projected"
    SODIUM_FALL_TOO_FAST = "sodium-fall-too-fast"
    SODIUM_FALL_IN_CRISIS = "sodium-fall-in-crisis"
    OSMOLALITY_FALL_TOO_FAST = "osmolality-fall-too-fast"
    GLUCOSE_FALL_TOO_FAST = "glucose-fall-too-fast"
    HYPOKALEMIA_ON_INSULIN = "hypokalemia-on-insulin"

    @property
    def display(self) -> str:
        """The rule in plain words: the display of its code in our rule CodeSystem and on each Flag."""
        return _DISPLAYS[self]


_DISPLAYS = {
    Rule.SODIUM_CRITICAL_LOW: "Sodium critically low",
    Rule.SODIUM_CRITICAL_HIGH: "Sodium critically high",
    Rule.POTASSIUM_CRITICAL_LOW: "Potassium critically low",
    Rule.POTASSIUM_CRITICAL_HIGH: "Potassium critically high",
    Rule.GLUCOSE_CRITICAL_LOW: "Glucose critically low",
    Rule.GLUCOSE_CRITICAL_HIGH: "Glucose critically high",
    Rule.OSMOLALITY_CRITICAL_LOW: "Osmolality critically low",
    Rule.OSMOLALITY_CRITICAL_HIGH: "Osmolality critically high",
    Rule.SODIUM_RISE_TOO_FAST: "Sodium rising too fast in hyponatraemia",
    Rule.SODIUM_RISE_PROJECTED: "Sodium rising at a pace that would exceed the 24 h limit",
    Rule.SODIUM_FALL_TOO_FAST: "Sodium falling too fast in hypernatraemia",
    Rule.SODIUM_FALL_IN_CRISIS: "Sodium falling too fast in a hyperglycaemic crisis",
    Rule.OSMOLALITY_FALL_TOO_FAST: "Osmolality falling too fast",
    Rule.GLUCOSE_FALL_TOO_FAST: "Glucose falling too fast",
    Rule.HYPOKALEMIA_ON_INSULIN: "Low potassium during insulin therapy",
}


class Priority(StrEnum):
    HIGH = "high"
    MEDIUM = "medium"
    LOW = "low"

    @property
    def flag_priority_code(self) -> str:
        """The code in http://hl7.org/fhir/flag-priority-code."""
        return {"high": "PH", "medium": "PM", "low": "PL"}[self.value]


def episode_key(onset: datetime) -> str:
    """An episode is named by the data time it began, so replays name it the same way."""
    return onset.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass(frozen=True, slots=True)
class Finding:
    """One rule's current finding for one patient.

    ``onset`` is the effective time of the first result of the episode (never the wall clock);
    ``episode`` names the episode, so (patient, rule, episode) keys one active flag.
    ``evidence`` holds version-specific references, sorted and without repeats.
    """

    rule: Rule
    patient: str
    priority: Priority
    evidence: tuple[str, ...]
    numbers: Mapping[str, float]
    sentence: str
    onset: datetime
    episode: str
    encounter: str | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "evidence", tuple(sorted(set(self.evidence))))
        object.__setattr__(self, "numbers", MappingProxyType(dict(sorted(self.numbers.items()))))

    @classmethod
    def of(
        cls,
        rule: Rule,
        patient: str,
        priority: Priority,
        evidence: Iterable[str],
        numbers: Mapping[str, float],
        sentence: str,
        onset: datetime,
        encounter: str | None = None,
    ) -> Finding:
        return cls(
            rule=rule,
            patient=patient,
            priority=priority,
            evidence=tuple(evidence),
            numbers=numbers,
            sentence=sentence,
            onset=onset,
            episode=episode_key(onset),
            encounter=encounter,
        )
