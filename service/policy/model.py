"""The shape of a site policy. Every threshold is a field with no default, so the TOML file is the
one place a value lives and a missing key is an error rather than a silent fallback.

Decision support only: thresholds are site policy, to be signed off locally; defer to local
protocols and licensed clinicians.
"""

from __future__ import annotations

import hashlib
import json
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, model_validator

from service.domain.findings import Priority
from service.domain.insulin import InsulinCodes
from service.domain.values import Analyte, Specimen

__all__ = [
    "CrisisRate",
    "Derived",
    "EscalationPolicy",
    "InsulinMedication",
    "InsulinPotassium",
    "LevelLimit",
    "Policy",
    "SodiumFall",
    "SodiumPolicy",
    "SodiumRise",
    "TimingPolicy",
    "policy_hash",
]

Positive = Annotated[float, Field(gt=0)]
Hours = Annotated[float, Field(gt=0)]
Minutes = Annotated[float, Field(ge=0)]
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

    @model_validator(mode="after")
    def _check(self) -> LevelLimit:
        _no_urine(self.specimens)
        if self.analyte is Analyte.UREA:
            raise ValueError("urea has no dangerous-level rule")
        if self.low >= self.high:
            raise ValueError("low must be below high")
        return self


class SodiumRise(_Section):
    limit_24h: Positive
    limit_24h_high_risk: Positive
    limit_48h: Positive
    applies_below: Positive
    high_risk_nadir_at_or_below: Positive
    high_risk_potassium_below: Positive
    projection_min_hours: Hours

    @model_validator(mode="after")
    def _check(self) -> SodiumRise:
        if self.limit_24h_high_risk > self.limit_24h:
            raise ValueError("limit_24h_high_risk must not exceed limit_24h")
        if self.limit_48h < self.limit_24h:
            raise ValueError("limit_48h must not be below limit_24h")
        return self


class SodiumFall(_Section):
    limit_24h: Positive
    max_rate_per_hour: Positive
    rate_min_hours: Hours
    applies_above: Positive


class SodiumPolicy(_Section):
    specimens: BloodSpecimens
    rise: SodiumRise
    fall: SodiumFall

    @model_validator(mode="after")
    def _check(self) -> SodiumPolicy:
        _no_urine(self.specimens)
        return self


class CrisisRate(_Section):
    osmolality_max_fall_per_hour: Positive
    glucose_max_fall_per_hour: Positive
    min_hours: Hours
    starting_glucose_at_least: Positive
    glucose_specimens: BloodSpecimens

    @model_validator(mode="after")
    def _check(self) -> CrisisRate:
        _no_urine(self.glucose_specimens)
        return self


class InsulinPotassium(_Section):
    below: Positive
    escalate_below: Positive
    routes: Annotated[tuple[str, ...], Field(min_length=1)]
    iv_tail_minutes: Minutes
    recheck_hours: Hours
    persistence_min_gap_minutes: Minutes
    specimens: BloodSpecimens

    @model_validator(mode="after")
    def _check(self) -> InsulinPotassium:
        _no_urine(self.specimens)
        if self.escalate_below > self.below:
            raise ValueError("escalate_below must not exceed below")
        return self


class Derived(_Section):
    sodium_glucose_factor: Positive
    pairing_minutes: Minutes
    show_corrected_sodium_from_glucose: Positive


class EscalationPolicy(_Section):
    """Which unacknowledged Flags are escalated, and how often."""

    priorities: Annotated[tuple[Priority, ...], Field(min_length=1)]
    unacknowledged_minutes: Positive


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
    insulin_potassium: InsulinPotassium
    insulin: InsulinMedication
    escalation: EscalationPolicy
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
