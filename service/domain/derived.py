"""Values derived from more than one result: glucose-corrected sodium, osmolalities, pairing.

All inputs in canonical units (mmol/L; osmolality mOsm/kg). Pure arithmetic, no I/O.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from datetime import datetime, timedelta
from typing import TYPE_CHECKING

from service.domain.values import LabResult

if TYPE_CHECKING:
    from service.policy.model import Policy

__all__ = [
    "GLUCOSE_MOLAR_MASS",
    "REFERENCE_GLUCOSE_MMOL",
    "calculated_osmolality",
    "corrected_sodium",
    "judged_corrected_sodium",
    "effective_osmolality",
    "pair_nearest",
]

GLUCOSE_MOLAR_MASS = 180.156  # g/mol, C6H12O6 from IUPAC conventional atomic weights
# The correction is defined per 100 mg/dL above 100 mg/dL; 100 mg/dL = 1000 mg/L ÷ 180.156 g/mol.
REFERENCE_GLUCOSE_MMOL = 1000.0 / GLUCOSE_MOLAR_MASS  # 5.55074 mmol/L


def corrected_sodium(sodium: float, glucose: float, factor: float = 1.6) -> float:
    """Sodium corrected for the water that hyperglycaemia draws out of cells.

    SI form of Na + F × (glucose mg/dL − 100)/100: F mmol/L per 5.55074 mmol/L of glucose above
    5.55074. F = 1.6 (Katz 1973) or 2.4 (Hillier 1999). Below the reference glucose no correction
    is made: the formula describes dilution by excess glucose, not a deficit.
    """
    excess = max(glucose - REFERENCE_GLUCOSE_MMOL, 0.0)
    return sodium + factor * excess / REFERENCE_GLUCOSE_MMOL


def effective_osmolality(
    sodium: float | None, glucose: float | None, measured: float | None = None
) -> float | None:
    """Tonicity: the measured osmolality when there is one, else 2·Na + glucose (urea left out,
    since it crosses cell membranes freely). None when neither can be had."""
    if measured is not None:
        return measured
    if sodium is None or glucose is None:
        return None
    return 2.0 * sodium + glucose


def calculated_osmolality(sodium: float, glucose: float, urea: float) -> float:
    """Calculated serum osmolality, SI form: 2·Na + glucose + urea, all mmol/L."""
    return 2.0 * sodium + glucose + urea


def pair_nearest(
    anchor: LabResult, candidates: Iterable[LabResult], window: timedelta
) -> LabResult | None:
    """The candidate drawn nearest in time to ``anchor``, if within ``window`` (inclusive).

    Ties go to the earlier draw, then the lower observation id, so the pairing never depends on
    the order results arrived in. Censored and valueless candidates are never paired.
    """
    best: LabResult | None = None
    best_key: tuple[timedelta, datetime, str] | None = None
    for candidate in candidates:
        if candidate.value is None or candidate.comparator is not None:
            continue
        gap = abs(candidate.effective - anchor.effective)
        key = (gap, candidate.effective, candidate.observation_id)
        if gap <= window and (best_key is None or key < best_key):
            best, best_key = candidate, key
    return best


def judged_corrected_sodium(
    sodium: LabResult, lab_glucose: Sequence[LabResult], policy: Policy
) -> tuple[float, LabResult] | None:
    """The glucose-corrected sodium the sodium rules judge in place of the measured one, with the glucose
    it rests on: the laboratory glucose drawn nearest ``sodium`` within the pairing window, when that
    glucose is at or above the policy's threshold. None when the measured sodium stands."""
    glucose = pair_nearest(sodium, lab_glucose, timedelta(minutes=policy.derived.pairing_minutes))
    if (sodium.value is None or glucose is None or glucose.value is None
            or glucose.value < policy.derived.corrected_sodium_from_glucose):
        return None
    return corrected_sodium(sodium.value, glucose.value, policy.derived.sodium_glucose_factor), glucose
