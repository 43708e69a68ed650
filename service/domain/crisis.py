"""Whether the data show a hyperglycaemic crisis at a moment: the gate of the crisis-rate rules.

Pure. At time ``at`` the data show a crisis when the latest glucose drawn by then (or within the
pairing window after) is at or above ``crisis.starting_glucose_at_least`` and at least one of:
  - a measured serum osmolality paired with that glucose at or above ``measured_osmolality_at_least``;
  - a calculated effective osmolality (2 Na + glucose) from a paired sodium at or above
    ``calculated_effective_osmolality_at_least``;
  - insulin therapy counted by the insulin-potassium policy running at ``at``.
Thresholds after the HHS criteria of Umpierrez GE et al, Diabetes Care 2024;47:1257-1275. A ward
patient whose moderately high glucose falls to normal, with normal tonicity and no insulin
infusion, is not in a crisis. Decision support only.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

from service.domain.derived import effective_osmolality, pair_nearest
from service.domain.insulin_exposure import exposure_active
from service.domain.rules.series import at_least, exact
from service.domain.values import Analyte, InsulinExposure, LabResult, Specimen
from service.policy.model import Policy

__all__ = ["Crisis", "crisis_at"]


@dataclass(frozen=True, slots=True)
class Crisis:
    glucose: LabResult
    because: str  # plain words: which criterion held
    evidence: tuple[str, ...]


def crisis_at(
    at: datetime,
    results: Sequence[LabResult],
    exposures: Sequence[InsulinExposure],
    policy: Policy,
) -> Crisis | None:
    rules = policy.crisis
    window = timedelta(minutes=policy.derived.pairing_minutes)
    glucose = [
        r for r in results
        if r.analyte is Analyte.GLUCOSE and r.specimen in rules.glucose_specimens and r.effective <= at + window
    ]
    if not glucose or not at_least(glucose[-1], rules.starting_glucose_at_least):
        return None
    glu = glucose[-1]
    measured = exact(
        r for r in results
        if r.analyte is Analyte.OSMOLALITY and r.specimen is Specimen.SERUM_PLASMA and not r.calculated
    )
    osm = pair_nearest(glu, measured, window)
    if osm is not None and osm.value is not None and osm.value >= rules.measured_osmolality_at_least:
        return Crisis(glu, f"measured osmolality {osm.value:g} mOsm/kg", (glu.reference, osm.reference))
    sodium = exact(r for r in results if r.analyte is Analyte.SODIUM and r.specimen is not Specimen.URINE)
    na = pair_nearest(glu, sodium, window)
    if na is not None and glu.value is not None and glu.comparator is None:
        effective = effective_osmolality(na.value, glu.value)
        if effective is not None and effective >= rules.calculated_effective_osmolality_at_least:
            return Crisis(glu, f"effective osmolality {effective:.0f} mOsm/kg",
                          (glu.reference, na.reference))
    running = [e for e in exposures if exposure_active(e, at, policy.insulin_potassium)]
    if running:
        return Crisis(glu, "insulin infusion running", (glu.reference, running[0].reference))
    return None
