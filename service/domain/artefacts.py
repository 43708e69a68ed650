"""Specimen-artefact suspicion: results that may show the sample rather than the patient.

Pure: ``suspects(results, policy)`` names each suspect result with the reason in a few words.
What makes a result suspect (site policy, ``[artefacts]``):

- the lab said so: the sample was marked haemolysed (specimen condition, interpretation, note) or
  carries a haemolysis index (read at the FHIR boundary into ``LabResult.quality``);
- K2EDTA contamination: potassium at or above ``edta_potassium_at_least`` with a calcium drawn
  within the pairing window at or below ``edta_calcium_at_most`` (Cornes MP et al, Ann Clin Biochem
  2008;45:601-603);
- a delta check after CLSI EP33: a result that moved more than ``change`` from the previous result
  of the same analyte and method within ``spike_within_hours``, toward the composition of an
  infusion fluid when ``toward`` is set, is suspect until a later result agrees with it (within
  ``change``). One that reverts at the next draw stays suspect: that is the drip-arm sample.

A suspect result is named on any finding it touches and is not used by rate rules; level rules
still judge it (a critical value is never suppressed by suspicion). Decision support only.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import timedelta

from service.domain.coverage import read_specimens
from service.domain.derived import pair_nearest
from service.domain.values import Analyte, LabResult, Method
from service.policy.model import Policy

__all__ = ["suspects"]


def suspects(results: Sequence[LabResult], policy: Policy) -> Mapping[str, str]:
    """Reason by version-specific reference, for each suspect result among the time-ordered ones."""
    found: dict[str, str] = {}
    for r in results:
        if r.quality:
            found[r.reference] = f"sample {r.quality}"
    _edta(results, policy, found)
    within = timedelta(hours=policy.artefacts.spike_within_hours)
    series: dict[tuple[Analyte, Method], list[LabResult]] = {}
    read = {analyte: read_specimens(analyte, policy) for analyte in policy.artefacts.delta}
    for r in results:
        # Only results some rule reads: one no rule reads (a point-of-care sodium under a policy that
        # reads none) must not make a readable neighbour look like a jump, nor change any finding.
        if (r.analyte in policy.artefacts.delta and r.value is not None and r.comparator is None
                and not r.calculated and r.specimen in read[r.analyte]):
            series.setdefault((r.analyte, r.method), []).append(r)
    for (analyte, _), same in series.items():
        check = policy.artefacts.delta[analyte]
        _delta(same, check.change, check.toward, within, found)
    return found


def _edta(results: Sequence[LabResult], policy: Policy, found: dict[str, str]) -> None:
    rules = policy.artefacts
    calcium = [r for r in results if r.analyte is Analyte.CALCIUM]
    window = timedelta(minutes=policy.derived.pairing_minutes)
    for k in results:
        if k.analyte is not Analyte.POTASSIUM or k.value is None or k.value < rules.edta_potassium_at_least:
            continue
        ca = pair_nearest(k, calcium, window)
        if ca is not None and ca.value is not None and ca.value <= rules.edta_calcium_at_most:
            reason = (
                f"potassium {_fmt(k.value)} with calcium {_fmt(ca.value)} mmol/L in the same draw "
                "suggests K2EDTA contamination"
            )
            found.setdefault(k.reference, reason)
            found.setdefault(ca.reference, reason)


def _delta(
    series: Sequence[LabResult],
    change: float,
    toward: float | None,
    within: timedelta,
    found: dict[str, str],
) -> None:
    for i in range(1, len(series)):
        previous, current = series[i - 1], series[i]
        assert previous.value is not None and current.value is not None
        moved = current.value - previous.value
        if abs(moved) <= change or current.effective - previous.effective > within:
            continue
        if toward is not None and abs(current.value - toward) >= abs(previous.value - toward):
            continue  # moved away from the fluid's composition: not what a drip-arm sample does
        following = series[i + 1] if i + 1 < len(series) else None
        if following is not None:
            assert following.value is not None
            if abs(following.value - current.value) <= change:
                continue  # a later result agrees: the change is the patient's
            what = "reverted at the next draw"
        else:
            what = "not yet confirmed by a later result"
        unit = "mOsm/kg" if current.analyte is Analyte.OSMOLALITY else "mmol/L"
        found.setdefault(
            current.reference,
            f"{current.analyte.value} moved {'+' if moved > 0 else ''}{_fmt(moved)} {unit} from the previous "
            f"result and {what}",
        )


def _fmt(value: float) -> str:
    text = f"{value:.1f}"
    return text[:-2] if text.endswith(".0") else text
