"""When an insulin administration counts as insulin therapy. Pure; the counted routes are policy.

- Intravenous: from its start until its end plus ``iv_tail_minutes``, or open-ended while it has no
  end (a stopped or completed infusion without an end time is given one when that status arrives,
  at the FHIR boundary).
- Subcutaneous, only when the policy lists the route (profile ``dka-subcutaneous``): a dose of a
  medication named in ``subcutaneous_medications`` counts for ``subcutaneous_dose_hours`` after it
  was given (or after its period ended).
Administrations recorded as not done or entered in error never count.
"""

from __future__ import annotations

from datetime import datetime, timedelta

from service.domain.values import InsulinExposure
from service.policy.model import InsulinPotassium

__all__ = ["exposure_active"]

_NEVER_GIVEN = frozenset({"not-done", "entered-in-error"})


def exposure_active(exposure: InsulinExposure, at: datetime, rules: InsulinPotassium) -> bool:
    """Whether the administration counts as insulin therapy at ``at`` (both ends inclusive)."""
    if exposure.status in _NEVER_GIVEN or exposure.route not in rules.routes:
        return False
    if exposure.start > at:
        return False
    if exposure.route == "subcutaneous":
        if not exposure.medication.startswith(rules.subcutaneous_medications):
            return False
        given = exposure.end or exposure.start
        return at <= given + timedelta(hours=rules.subcutaneous_dose_hours)
    if exposure.end is None:
        return True
    return at <= exposure.end + timedelta(minutes=rules.iv_tail_minutes)
