"""The shape of a site policy. Every threshold is a field with no default, so the TOML file is the
one place a value lives and a missing key is an error rather than a silent fallback.

Decision support only: thresholds are site policy, to be signed off locally; defer to local
protocols and licensed clinicians.
"""

from __future__ import annotations

import hashlib
import json
import re
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, model_validator

from service.domain.catalogue import lookup
from service.domain.findings import Priority
from service.domain.insulin import InsulinCodes
from service.domain.units import UnitNotAccepted, to_canonical
from service.domain.values import Analyte, Specimen

__all__ = [
    "AlertingPolicy",
    "AnalyteSteps",
    "CrisisRate",
    "Artefacts",
    "CrisisSodiumFall",
    "DeltaCheck",
    "Derived",
    "EscalationPolicy",
    "InsulinMedication",
    "InsulinPotassium",
    "LevelLimit",
    "Policy",
    "RateSteps",
    "SodiumFall",
    "SodiumPolicy",
    "SodiumRise",
    "TimingPolicy",
    "policy_hash",
]

# A LOINC term per analyte and unit family, used only to convert a threshold written in the unit of
# its source ("250 mg/dL") with exactly the factor a result in that unit is converted with, so a
# result of 250 mg/dL compares equal to a threshold of "250 mg/dL".
_THRESHOLD_TERMS = {
    Analyte.SODIUM: ("2951-2",),
    Analyte.POTASSIUM: ("2823-3",),
    Analyte.GLUCOSE: ("14749-6", "2345-7"),
    Analyte.OSMOLALITY: ("2692-2",),
    Analyte.CALCIUM: ("2000-8", "17861-6"),
    Analyte.UREA: ("22664-7", "3091-6"),
}
_WITH_UNIT = re.compile(r"^\s*([0-9]+(?:\.[0-9]+)?)\s+(\S+)\s*$")


def in_canonical_unit(analyte: Analyte, value: Any) -> Any:
    """A threshold as a number in the analyte's canonical unit; "250 mg/dL" is converted exactly.

    A plain number is taken to be in the canonical unit already. Anything else is handed on for
    pydantic to refuse with its own message.
    """
    if not isinstance(value, str):
        return value
    match = _WITH_UNIT.match(value)
    if match is None:
        raise ValueError(f"write a threshold as a number or as 'number unit', e.g. '250 mg/dL' (got {value!r})")
    number, unit = float(match.group(1)), match.group(2)
    accepted: list[str] = []
    for code in _THRESHOLD_TERMS[analyte]:
        entry = lookup(code)
        assert entry is not None
        try:
            return to_canonical(entry, number, code=unit, text=None)
        except UnitNotAccepted as exc:
            accepted += exc.accepted
    raise ValueError(f"unit {unit!r} is not a UCUM unit for {analyte}; use one of {', '.join(accepted)}")


def _threshold(analyte: Analyte) -> BeforeValidator:
    return BeforeValidator(lambda v: in_canonical_unit(analyte, v))


Positive = Annotated[float, Field(gt=0)]
Hours = Annotated[float, Field(gt=0)]
Minutes = Annotated[float, Field(ge=0)]
GlucoseThreshold = Annotated[float, _threshold(Analyte.GLUCOSE), Field(gt=0)]
SodiumThreshold = Annotated[float, _threshold(Analyte.SODIUM), Field(gt=0)]
PotassiumThreshold = Annotated[float, _threshold(Analyte.POTASSIUM), Field(gt=0)]
OsmolalityThreshold = Annotated[float, _threshold(Analyte.OSMOLALITY), Field(gt=0)]
CalciumThreshold = Annotated[float, _threshold(Analyte.CALCIUM), Field(gt=0)]
BloodSpecimens = Annotated[tuple[Specimen, ...], Field(min_length=1)]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


def _no_urine(specimens: tuple[Specimen, ...]) -> None:
    # Urine concentrations are a different quantity: they must never feed serum rules.
    if Specimen.URINE in specimens:
        raise ValueError("urine results never feed these rules")
    if len(set(specimens)) != len(specimens):
        raise ValueError("a specimen is listed twice")


class LevelLimit(_Section):
    """Dangerous low and high for one analyte in the given specimens (both inclusive)."""

    analyte: Analyte
    specimens: BloodSpecimens
    low: Positive
    high: Positive

    @model_validator(mode="before")
    @classmethod
    def _units(cls, data: Any) -> Any:
        # Limits may be written in the unit of their source ("45 mg/dL"); the analyte says how
        # to convert them.
        if isinstance(data, dict) and data.get("analyte") in set(Analyte):
            analyte = Analyte(data["analyte"])
            return {**data, **{k: in_canonical_unit(analyte, data[k]) for k in ("low", "high") if k in data}}
        return data

    @model_validator(mode="after")
    def _check(self) -> LevelLimit:
        _no_urine(self.specimens)
        if self.analyte in (Analyte.UREA, Analyte.CALCIUM):
            raise ValueError(f"{self.analyte} has no dangerous-level rule")
        if self.low >= self.high:
            raise ValueError("low must be below high")
        return self


class SodiumRise(_Section):
    limit_24h: Positive
    limit_24h_after_first_day: Positive  # the limit for each 24 h after the first; = limit_24h to keep one limit
    limit_24h_high_risk: Positive
    limit_48h: Positive
    applies_below: SodiumThreshold
    stand_down_measured_osmolality_at_least: OsmolalityThreshold
    high_risk_nadir_at_or_below: SodiumThreshold
    high_risk_potassium_below: PotassiumThreshold
    projection_min_hours: Hours
    projection_min_results_after_nadir: Annotated[int, Field(ge=1)]
    projection_min_change: Positive

    @model_validator(mode="after")
    def _check(self) -> SodiumRise:
        if self.limit_24h_high_risk > self.limit_24h:
            raise ValueError("limit_24h_high_risk must not exceed limit_24h")
        if self.limit_24h_after_first_day > self.limit_24h:
            raise ValueError("limit_24h_after_first_day must not exceed limit_24h")
        if self.limit_48h < self.limit_24h:
            raise ValueError("limit_48h must not be below limit_24h")
        return self


class SodiumFall(_Section):
    limit_24h: Positive
    max_rate_per_hour: Positive
    rate_min_hours: Hours
    applies_above: SodiumThreshold


class CrisisSodiumFall(_Section):
    """Glucose-corrected sodium falling while the data show a hyperglycaemic crisis."""

    limit_24h: Positive
    priority: Priority


class SodiumPolicy(_Section):
    specimens: BloodSpecimens
    # Added to a limit when a change is measured between a direct (whole-blood) and an indirect
    # (laboratory) result, so method bias alone cannot make a rate.
    method_bias_allowance: Annotated[float, Field(ge=0)]
    rise: SodiumRise
    fall: SodiumFall
    crisis_fall: CrisisSodiumFall

    @model_validator(mode="after")
    def _check(self) -> SodiumPolicy:
        _no_urine(self.specimens)
        return self


class CrisisRate(_Section):
    osmolality_max_fall_per_hour: Positive
    glucose_max_fall_per_hour: Positive
    min_hours: Hours
    starting_glucose_at_least: GlucoseThreshold
    # The data show a crisis when glucose is at or above the threshold above and either osmolality
    # criterion holds, or IV insulin is running.
    calculated_effective_osmolality_at_least: OsmolalityThreshold
    measured_osmolality_at_least: OsmolalityThreshold
    glucose_specimens: BloodSpecimens

    @model_validator(mode="after")
    def _check(self) -> CrisisRate:
        _no_urine(self.glucose_specimens)
        return self


class InsulinPotassium(_Section):
    hold_below: PotassiumThreshold
    below: PotassiumThreshold
    escalate_below: PotassiumThreshold
    routes: Annotated[tuple[str, ...], Field(min_length=1)]
    iv_tail_minutes: Minutes
    # A subcutaneous dose counts for this long after it was given, when "subcutaneous" is among
    # the routes and its medication starts with one of these "system|code" prefixes.
    subcutaneous_dose_hours: Hours
    subcutaneous_medications: tuple[Annotated[str, Field(min_length=1)], ...]
    recheck_hours: Hours
    persistence_min_gap_minutes: Minutes
    specimens: BloodSpecimens

    @model_validator(mode="after")
    def _check(self) -> InsulinPotassium:
        _no_urine(self.specimens)
        if self.escalate_below > self.below:
            raise ValueError("escalate_below must not exceed below")
        if self.hold_below > self.below:
            raise ValueError("hold_below must not exceed below")
        return self


class Derived(_Section):
    sodium_glucose_factor: Positive
    pairing_minutes: Minutes
    # Rules judge sodium corrected for glucose (and sentences show it) when the paired glucose is
    # at least this.
    corrected_sodium_from_glucose: GlucoseThreshold


class DeltaCheck(_Section):
    """A result that moves more than ``change`` (canonical unit) from its neighbour is checked for
    being a specimen artefact; ``toward`` is the composition an infusion fluid would pull it to."""

    change: Positive
    toward: float | None = None


class Artefacts(_Section):
    """When a result is suspected of being a specimen artefact rather than the patient."""

    delta: dict[Analyte, DeltaCheck]
    spike_within_hours: Hours
    edta_potassium_at_least: PotassiumThreshold
    edta_calcium_at_most: CalciumThreshold


class EscalationPolicy(_Section):
    """Which unacknowledged Flags are escalated, and how often: minutes per priority (a priority not
    listed is never escalated)."""

    after_minutes: Annotated[dict[Priority, Positive], Field(min_length=1)]


class AnalyteSteps(_Section):
    """A worsening step per analyte, in canonical units (mmol/L; osmolality mOsm/kg)."""

    sodium: Positive
    potassium: Positive
    glucose: Positive
    osmolality: Positive


class RateSteps(_Section):
    """A worsening step for the rate rules, in canonical units per hour."""

    glucose: Positive
    osmolality: Positive


class AlertingPolicy(_Section):
    """When a new Flag version pages the responder topic: a worsening of its rule's measure by at least
    one step since the last page (service/domain/alerting.py says which number each rule is measured by)."""

    worsening_step: AnalyteSteps
    worsening_step_per_hour: RateSteps

    def step(self, analyte: Analyte, *, per_hour: bool) -> float | None:
        """The step for this analyte's measure; None when the policy sets none (then every version pages)."""
        steps: BaseModel = self.worsening_step_per_hour if per_hour else self.worsening_step
        value = getattr(steps, analyte.value, None)
        return float(value) if isinstance(value, (int, float)) else None


class TimingPolicy(_Section):
    """How collection times far from the server's clock are treated (see README, Flags)."""

    # A collection time up to this far after the server's clock is judged as now; beyond it, refused.
    future_tolerance_minutes: Minutes
    # A Flag whose newest result arrived more than this after its collection says so in its sentence.
    late_note_after_minutes: Minutes


class InsulinMedication(_Section):
    """Which medication codings count as insulin: ATC prefixes and single "system|code" entries."""

    atc_prefixes: Annotated[tuple[Annotated[str, Field(min_length=1)], ...], Field(min_length=1)]
    codes: tuple[Annotated[str, Field(pattern=r"^[^|]+\|[^|]+$")], ...]

    def codes_matcher(self) -> InsulinCodes:
        return InsulinCodes(atc_prefixes=self.atc_prefixes, codes=frozenset(self.codes))


class Policy(_Section):
    """One resolved profile of the site policy."""

    profile: Annotated[str, Field(min_length=1)]
    derived: Derived
    levels: Annotated[tuple[LevelLimit, ...], Field(min_length=1)]
    sodium: SodiumPolicy
    crisis: CrisisRate
    artefacts: Artefacts
    insulin_potassium: InsulinPotassium
    insulin: InsulinMedication
    escalation: EscalationPolicy
    alerting: AlertingPolicy
    timing: TimingPolicy

    @model_validator(mode="after")
    def _check(self) -> Policy:
        seen: set[tuple[Analyte, Specimen]] = set()
        for limit in self.levels:
            for specimen in limit.specimens:
                if (limit.analyte, specimen) in seen:
                    raise ValueError(f"{limit.analyte} in {specimen} has two level limits")
                seen.add((limit.analyte, specimen))
        return self

    def level_for(self, analyte: Analyte, specimen: Specimen) -> LevelLimit | None:
        """The dangerous-level limits for one analyte in one specimen, if the site set any."""
        for limit in self.levels:
            if limit.analyte is analyte and specimen in limit.specimens:
                return limit
        return None


def policy_hash(policy: Policy) -> str:
    """sha256 of a canonical JSON form: sorted keys, no spaces, floats as pydantic dumps them.

    Recorded on every flag, so a reviewer can tell which thresholds a flag was judged under.
    """
    canonical = json.dumps(
        policy.model_dump(mode="json"), sort_keys=True, separators=(",", ":"), ensure_ascii=True
    )
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()
