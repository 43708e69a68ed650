"""A cheap first look at each resource, before the expensive model validation.

A real panel carries a dozen analytes and lytestream watches four: results of codes outside the
catalogue, and medications that are not insulin, are acknowledged and dropped here without being
validated or stored.

A result that looks like a watched one sent wrong (service/domain/code_mistakes.py) is dropped the
same way, as a warning naming the likely mistake, and counted per client. Not a 422: in a
transaction one mistyped mapping would then refuse the Bundle's good results too, and holding back
a correctly coded sodium or potassium to make a point costs more than the warning; the count in
$summary and the dropped-code AuditEvent are what make the mapping get fixed.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import Any

from service.domain.catalogue import LOINC_SYSTEM, CatalogueEntry, lookup
from service.domain.code_mistakes import likely_mistake
from service.domain.insulin import InsulinCodes

__all__ = ["Kind", "Triage", "triage"]


class Kind(StrEnum):
    OBSERVATION = "observation"
    INSULIN = "insulin"
    PATIENT = "patient"
    IGNORED = "ignored"


@dataclass(frozen=True, slots=True)
class Triage:
    kind: Kind
    entry: CatalogueEntry | None = None
    reason: str = ""
    suspect: bool = False  # dropped, but it looks like a watched code sent wrong (said in ``reason``)


def triage(resource: dict[str, Any], insulin: InsulinCodes) -> Triage:
    """What to do with this resource: process it, or acknowledge and drop it (with the reason)."""
    rtype = resource.get("resourceType")
    if rtype == "Observation":
        code = resource.get("code")
        codings = code.get("coding") if isinstance(code, dict) else None
        if not isinstance(codings, list):
            # Malformed enough that the models must say what is wrong.
            return Triage(Kind.OBSERVATION)
        for coding in codings:
            if isinstance(coding, dict) and coding.get("system") == LOINC_SYSTEM:
                entry = lookup(str(coding.get("code")))
                if entry is not None:
                    return Triage(Kind.OBSERVATION, entry)
        mistake = likely_mistake(codings)
        if mistake is not None:
            return Triage(Kind.IGNORED, reason=f"{mistake}; not stored", suspect=True)
        return Triage(Kind.IGNORED, reason="Observation code is not one lytestream watches; not stored")
    if rtype == "MedicationAdministration":
        concept = resource.get("medicationCodeableConcept")
        codings = concept.get("coding") if isinstance(concept, dict) else None
        if isinstance(codings, list) and insulin.match(c for c in codings if isinstance(c, dict)):
            return Triage(Kind.INSULIN)
        if "medicationReference" in resource:
            return Triage(
                Kind.IGNORED,
                reason="medicationReference is not resolved; send medicationCodeableConcept "
                "for insulin to be recognised; not stored",
            )
        return Triage(Kind.IGNORED, reason="medication is not insulin under the site policy; not stored")
    if rtype == "Patient":
        return Triage(Kind.PATIENT)
    return Triage(Kind.IGNORED, reason=f"{rtype} is not a resource lytestream watches; not stored")
