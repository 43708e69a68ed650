"""The clinical rules: ``evaluate(timeline, policy, now)`` gives every current finding for one patient.

Pure and deterministic: no I/O, no clock (``now`` is passed in), the same data in any order give the
same findings. Decision support only: thresholds are site policy; findings describe the data and
defer to local protocols and licensed clinicians.
"""

from __future__ import annotations

from datetime import datetime

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
        {r for r in timeline.results if r.specimen is not Specimen.URINE},
        key=lambda r: (r.effective, r.observation_id, r.version),
    )
    exposures = sorted(
        set(timeline.exposures), key=lambda e: (e.start, e.source_id, e.version)
    )
    patient = timeline.patient
    findings = [
        *evaluate_levels(results, policy, patient),
        *evaluate_sodium_rate(results, policy, patient),
        *evaluate_crisis_rate(results, policy, patient),
        *evaluate_insulin_potassium(results, exposures, policy, patient, now),
    ]
    return sorted(findings, key=lambda f: (f.rule.value, f.episode))
