"""Plain value objects that every layer past the FHIR boundary speaks.

They are frozen and carry canonical units only, so the rule code never sees a UCUM string or a
FHIR model. Times are timezone-aware UTC.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from enum import StrEnum

__all__ = [
    "Analyte",
    "InsulinExposure",
    "LabResult",
    "Method",
    "ResultStatus",
    "Specimen",
    "Timeline",
]


class Analyte(StrEnum):
    """What was measured. Canonical units: sodium, potassium, glucose, urea mmol/L; osmolality mosm/kg."""

    SODIUM = "sodium"
    POTASSIUM = "potassium"
    GLUCOSE = "glucose"
    OSMOLALITY = "osmolality"
    UREA = "urea"
    CALCIUM = "calcium"  # context only: read by the specimen-artefact checks, never flagged itself


class Specimen(StrEnum):
    """Where it was measured. Urine never feeds serum rules."""

    SERUM_PLASMA = "serum-plasma"
    WHOLE_BLOOD = "whole-blood"  # arterial, venous, capillary or unspecified blood on an analyser
    POINT_OF_CARE = "point-of-care"  # meter or test strip; a flag on it asks for a lab confirmation
    URINE = "urine"


class Method(StrEnum):
    """How a sodium (or other electrolyte) was measured, as far as the code and specimen tell.

    Whole-blood analysers (blood gas, point of care) measure by direct ISE; laboratory serum or
    plasma analysers mostly by indirect ISE, which reads a few mmol/L lower for sodium when
    protein is low (Story DA et al, Anesth Analg 2007;104:893-897). Rates compare like with like.
    """

    DIRECT = "direct"
    INDIRECT = "indirect"
    UNKNOWN = "unknown"  # e.g. LOINC 77139-4 "Serum, Plasma or Blood": either kind of analyser


class ResultStatus(StrEnum):
    """FHIR observation-status codes (http://hl7.org/fhir/observation-status)."""

    REGISTERED = "registered"
    PRELIMINARY = "preliminary"
    FINAL = "final"
    AMENDED = "amended"
    CORRECTED = "corrected"
    CANCELLED = "cancelled"
    ENTERED_IN_ERROR = "entered-in-error"
    UNKNOWN = "unknown"


@dataclass(frozen=True, slots=True)
class LabResult:
    """One current version of one stored Observation, normalised.

    ``value`` is in the analyte's canonical unit, or None for a non-numeric or absent value.
    ``comparator`` keeps a censored value ("<", "<=", ">=", ">") as such: ``value`` is then the bound.
    """

    observation_id: str
    version: int
    patient: str
    analyte: Analyte
    specimen: Specimen
    loinc: str
    status: ResultStatus
    effective: datetime
    value: float | None
    comparator: str | None = None
    calculated: bool = False  # e.g. osmolality by calculation rather than measured
    issued: datetime | None = None
    encounter: str | None = None
    # The business identifier ("system|value"): stable across replays, unlike the server id, so it
    # breaks ties between results drawn at the same instant.
    key: str = ""
    # What the lab said about the sample's quality, e.g. "haemolysed (specimen condition HEM)".
    quality: str | None = None
    arrived: datetime | None = None  # when this version was stored here (its "arrival"), if known
    # The value and unit as the lab sent them (sentences show them beside the canonical value).
    sent_value: float | None = None
    sent_unit: str | None = None

    @property
    def reference(self) -> str:
        """Version-specific FHIR reference, the form evidence is cited in."""
        return f"Observation/{self.observation_id}/_history/{self.version}"

    @property
    def method(self) -> Method:
        if self.loinc in _EITHER_METHOD:
            return Method.UNKNOWN
        if self.specimen in (Specimen.WHOLE_BLOOD, Specimen.POINT_OF_CARE):
            return Method.DIRECT
        return Method.INDIRECT

    @property
    def order_key(self) -> tuple[datetime, datetime, str, str, int]:
        """The total order of results: collection time, then issued, then the stable identifier.

        Two results drawn at the same instant always fall in the same order, whatever order they
        arrived in and whatever ids the server gave them.
        """
        return (self.effective, self.issued or self.effective, self.key, self.observation_id, self.version)


# LOINC terms whose specimen may be serum, plasma or blood: the analyser kind is not known.
_EITHER_METHOD = frozenset({"77139-4", "77142-8", "74774-1", "77135-2"})


@dataclass(frozen=True, slots=True)
class InsulinExposure:
    """An insulin administration: open (``end`` None) while it is in progress."""

    source_id: str  # MedicationAdministration id on this server
    version: int
    patient: str
    start: datetime
    end: datetime | None
    route: str | None  # "intravenous", "subcutaneous", other free code, or None when unknown
    status: str  # MedicationAdministration.status
    medication: str  # "system|code" of the insulin coding that matched policy

    @property
    def reference(self) -> str:
        return f"MedicationAdministration/{self.source_id}/_history/{self.version}"


@dataclass(frozen=True, slots=True)
class Timeline:
    """A patient's usable results and insulin exposures inside a look-back window.

    ``results`` hold only results that may feed rules (not withdrawn, not cancelled, not replaced),
    ordered by effective time then observation id, so the order never depends on arrival.
    """

    patient: str
    window_start: datetime
    window_end: datetime
    results: tuple[LabResult, ...] = field(default_factory=tuple)
    exposures: tuple[InsulinExposure, ...] = field(default_factory=tuple)
    # Versionless references ("Observation/x") of records in the window that were entered in error:
    # a flag resting only on them is withdrawn rather than closed.
    withdrawn: frozenset[str] = frozenset()

    def of(self, analyte: Analyte, *specimens: Specimen) -> tuple[LabResult, ...]:
        """The results of one analyte, optionally only from the given specimens, in time order."""
        return tuple(
            r
            for r in self.results
            if r.analyte is analyte and (not specimens or r.specimen in specimens)
        )
