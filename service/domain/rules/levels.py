"""Dangerous levels: the most recent result of an analyte at or beyond a critical limit.

Both limits are inclusive (a result equal to the limit is dangerous), as the site-policy defaults are
written ("<=120", ">=160"). For each analyte and side, the latest result that proves something
decides: a newer result back inside the limit clears the finding. A censored result counts only
when its bound proves the side in question (">33.3 mmol/L" proves a high glucose; "<1.1" a low
one); one that proves nothing is passed over. Calculated results (e.g. a reported calculated
osmolality) are not measurements and are left out. Decision support only.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

from service.domain.derived import judged_corrected_sodium
from service.domain.findings import Finding, Priority, Rule
from service.domain.rules.series import (
    LAB_BLOOD,
    UNITS,
    Verdict,
    at_or_above,
    at_or_below,
    fmt,
    shown,
    trailing_run_start,
)
from service.domain.values import Analyte, LabResult, Specimen
from service.policy.model import LevelLimit, Policy

__all__ = ["evaluate_levels"]

_RULES = {
    (Analyte.SODIUM, "low"): Rule.SODIUM_CRITICAL_LOW,
    (Analyte.SODIUM, "high"): Rule.SODIUM_CRITICAL_HIGH,
    (Analyte.POTASSIUM, "low"): Rule.POTASSIUM_CRITICAL_LOW,
    (Analyte.POTASSIUM, "high"): Rule.POTASSIUM_CRITICAL_HIGH,
    (Analyte.GLUCOSE, "low"): Rule.GLUCOSE_CRITICAL_LOW,
    (Analyte.GLUCOSE, "high"): Rule.GLUCOSE_CRITICAL_HIGH,
    (Analyte.OSMOLALITY, "low"): Rule.OSMOLALITY_CRITICAL_LOW,
    (Analyte.OSMOLALITY, "high"): Rule.OSMOLALITY_CRITICAL_HIGH,
}

_SPECIMEN_WORDS = {
    Specimen.SERUM_PLASMA: "",
    Specimen.WHOLE_BLOOD: " (whole blood)",
    Specimen.POINT_OF_CARE: " (point-of-care)",
}

_Judge = Callable[[LabResult, float], Verdict]


def evaluate_levels(results: Sequence[LabResult], policy: Policy, patient: str) -> list[Finding]:
    """Critical-level findings for one patient's time-ordered, urine-free results."""
    findings: list[Finding] = []
    for analyte in (Analyte.SODIUM, Analyte.POTASSIUM, Analyte.GLUCOSE, Analyte.OSMOLALITY):
        watched = [
            (r, limit)
            for r in results
            if r.analyte is analyte
            and not r.calculated
            and (limit := policy.level_for(analyte, r.specimen)) is not None
        ]
        for side, judge in (("low", at_or_below), ("high", at_or_above)):
            finding = _side(watched, side, judge, analyte, results, policy, patient)
            if finding is not None:
                findings.append(finding)
    return findings


def _side(
    watched: Sequence[tuple[LabResult, LevelLimit]],
    side: str,
    judge: _Judge,
    analyte: Analyte,
    results: Sequence[LabResult],
    policy: Policy,
    patient: str,
) -> Finding | None:
    informative = [
        (r, limit, verdict)
        for r, limit in watched
        if (verdict := judge(r, limit.low if side == "low" else limit.high)) is not Verdict.UNKNOWN
    ]
    # Results drawn at the same instant (one specimen run twice, a gas and a lab sample stamped
    # alike) are one moment: it is dangerous if any of them is, whatever order they arrived in.
    instants: list[list[tuple[LabResult, LevelLimit, Verdict]]] = []
    for item in informative:
        if instants and instants[-1][0][0].effective == item[0].effective:
            instants[-1].append(item)
        else:
            instants.append([item])
    start = trailing_run_start(len(instants), lambda i: any(v is Verdict.DANGER for *_, v in instants[i]))
    if start is None:
        return None
    dangerous = [item for item in instants[-1] if item[2] is Verdict.DANGER]
    # Of several dangerous results at the latest instant, the most extreme is shown.
    result, limit, _ = (min if side == "low" else max)(dangerous, key=lambda item: item[0].value or 0.0)
    bound = limit.low if side == "low" else limit.high
    unit = UNITS[analyte]
    sentence = (
        f"{analyte.value.capitalize()}{_SPECIMEN_WORDS[result.specimen]} {shown(result)}, "
        f"at or {'below' if side == 'low' else 'above'} the critical limit of {fmt(bound)} {unit}"
    )
    numbers = {"value": result.value or 0.0, "limit": bound}
    evidence = [result.reference]
    if analyte is Analyte.SODIUM and result.value is not None:
        judged = judged_corrected_sodium(
            result, [r for r in results if r.analyte is Analyte.GLUCOSE and r.specimen in LAB_BLOOD], policy)
        if judged is not None:
            corrected, glucose = judged
            assert glucose.value is not None  # a paired glucose always has one
            sentence += f"; glucose-corrected sodium {fmt(corrected)} mmol/L with glucose {shown(glucose)}"
            numbers |= {"corrected_sodium": corrected, "glucose": glucose.value}
            evidence.append(glucose.reference)
    if result.specimen is Specimen.POINT_OF_CARE:
        sentence += "; confirm with a laboratory sample"
    return Finding.of(
        rule=_RULES[(analyte, side)],
        patient=patient,
        priority=Priority.HIGH,
        evidence=evidence,
        numbers=numbers,
        sentence=sentence + ".",
        onset=instants[start][0][0].effective,
        encounter=result.encounter,
    )
