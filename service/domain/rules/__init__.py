"""The clinical rules: ``evaluate(timeline, policy, now)`` gives every current finding for one patient.

Pure and deterministic: no I/O, no clock (``now`` is passed in), the same data in any order give the
same findings. Results are put in one total order (collection time, issued, business identifier),
so results drawn at the same instant are always judged alike. Suspect results (possible specimen
artefacts) feed the level rules but not the rate rules, and every finding that cites one says so.
Decision support only: thresholds are site policy; findings describe the data and defer to local
protocols and licensed clinicians.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from datetime import datetime

from service.domain.artefacts import suspects
from service.domain.findings import Finding
from service.domain.rules.crisis_rate import evaluate_crisis_rate
from service.domain.rules.insulin_potassium import evaluate_insulin_potassium
from service.domain.rules.levels import evaluate_levels
from service.domain.rules.sodium_rate import evaluate_sodium_rate
from service.domain.values import Specimen, Timeline
from service.policy.model import Policy

__all__ = ["evaluate"]


def evaluate(timeline: Timeline, policy: Policy, now: datetime) -> list[Finding]:
    """All current findings for the timeline's patient, sorted by rule code then episode."""
    # Urine never reaches a rule. Repeats are dropped and the order re-established here, so a
    # duplicated or re-sent result can never change a finding.
    results = sorted(
        {r for r in timeline.results if r.specimen is not Specimen.URINE}, key=lambda r: r.order_key
    )
    exposures = sorted(
        set(timeline.exposures), key=lambda e: (e.start, e.source_id, e.version)
    )
    suspect = suspects(results, policy)
    trusted = [r for r in results if r.reference not in suspect]
    patient = timeline.patient
    findings = [
        *evaluate_levels(results, policy, patient),
        *evaluate_sodium_rate(trusted, exposures, policy, patient),
        *evaluate_crisis_rate(trusted, exposures, policy, patient),
        *evaluate_insulin_potassium(results, exposures, policy, patient, now),
    ]
    return sorted((_annotate(f, suspect) for f in findings), key=lambda f: (f.rule.value, f.episode))


def _annotate(finding: Finding, suspect: Mapping[str, str]) -> Finding:
    """Name any suspect result the finding rests on; the finding itself is never suppressed."""
    reasons = [suspect[ref] for ref in finding.evidence if ref in suspect]
    if not reasons:
        return finding
    return replace(
        finding,
        sentence=f"{finding.sentence} Possible specimen artefact: {'; '.join(reasons)}; repeat the sample.",
        numbers={**finding.numbers, "suspect_results": float(len(reasons))},
    )
