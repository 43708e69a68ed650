"""Sodium corrected too fast: rising in hyponatraemia, falling in hypernatraemia.

Every rise or fall is measured at the latest exact sodium against the lowest (or highest) sodium in
the window that ends there; windows are inclusive at both ends ([t - 24 h, t]). Of equal lows the
latest is the nadir, since a rise begins there. Censored sodium values are left out: a rise cannot
be measured on a bound.

Rise (hyponatraemia), flagged when the nadir is strictly below ``applies_below`` (130):
  rise from the 24 h nadir strictly above ``limit_24h`` (10), or ``limit_24h_high_risk`` (8) when the
  data show high risk: a 48 h nadir at or below 105, or a potassium strictly below 3.5 in the 48 h
  window; or rise from the 48 h nadir strictly above ``limit_48h`` (18).
Projected rise, a warning while no limit is crossed yet: rise since the 24 h nadir, measured over at
  least ``projection_min_hours`` (inclusive), which extrapolated to 24 h would be strictly above the
  24 h limit.
Fall (hypernatraemia), flagged when the 24 h peak is strictly above ``applies_above`` (145):
  fall from that peak strictly above ``limit_24h`` (10), or a fall strictly faster than
  ``max_rate_per_hour`` (0.5) measured over at least ``rate_min_hours`` (4, inclusive).

Decision support only: these describe the data against site policy; they do not prescribe.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import timedelta

from service.domain.findings import Finding, Priority, Rule
from service.domain.rules.series import (
    LAB_BLOOD,
    Verdict,
    below,
    exact,
    fmt,
    hours,
    latest_max,
    latest_min,
    trailing_run_start,
    within,
)
from service.domain.values import Analyte, LabResult
from service.policy.model import Policy

__all__ = ["evaluate_sodium_rate"]

_DAY = timedelta(hours=24)
_TWO_DAYS = timedelta(hours=48)


@dataclass(frozen=True, slots=True)
class _Assessment:
    rule: Rule
    priority: Priority
    evidence: tuple[str, ...]
    numbers: dict[str, float]
    sentence: str


def evaluate_sodium_rate(results: Sequence[LabResult], policy: Policy, patient: str) -> list[Finding]:
    """Rise, projected-rise and fall findings for one patient's time-ordered, urine-free results."""
    sodium = exact(
        r for r in results if r.analyte is Analyte.SODIUM and r.specimen in policy.sodium.specimens
    )
    potassium = [r for r in results if r.analyte is Analyte.POTASSIUM and r.specimen in LAB_BLOOD]

    def rise(i: int) -> _Assessment | None:
        return _rise(sodium[: i + 1], potassium, policy)

    def projected(i: int) -> _Assessment | None:
        return _projected(sodium[: i + 1], potassium, policy)

    def fall(i: int) -> _Assessment | None:
        return _fall(sodium[: i + 1], policy)

    findings = []
    for assess in (rise, projected, fall):
        start = trailing_run_start(len(sodium), lambda i: assess(i) is not None)  # noqa: B023
        if start is None:
            continue
        current = assess(len(sodium) - 1)
        assert current is not None  # the run ends at the last point, so it fires there
        findings.append(
            Finding.of(
                rule=current.rule,
                patient=patient,
                priority=current.priority,
                evidence=current.evidence,
                numbers=current.numbers,
                sentence=current.sentence,
                onset=sodium[start].effective,
                encounter=sodium[-1].encounter,
            )
        )
    return findings


@dataclass(frozen=True, slots=True)
class _Rise:
    nadir: LabResult
    current: LabResult
    rise: float
    hours: float
    limit: float
    window: int
    risk: tuple[str, ...]  # references proving high risk; empty when normal risk
    risk_words: str


def _measure(sodium: Sequence[LabResult], potassium: Sequence[LabResult], policy: Policy) -> list[_Rise]:
    """The 24 h and 48 h rise of the latest sodium (when its nadir is in range), 24 h first."""
    rules = policy.sodium.rise
    current = sodium[-1]
    nadir24 = latest_min(within(sodium, current.effective, _DAY))
    nadir48 = latest_min(within(sodium, current.effective, _TWO_DAYS))
    risk: list[str] = []
    words: list[str] = []
    if nadir48.value is not None and nadir48.value <= rules.high_risk_nadir_at_or_below:
        risk.append(nadir48.reference)
        words.append(f"nadir {fmt(nadir48.value)}")
    low_k = [
        k
        for k in within(potassium, current.effective, _TWO_DAYS)
        if below(k, rules.high_risk_potassium_below) is Verdict.DANGER
    ]
    if low_k:
        risk.append(low_k[-1].reference)
        words.append(f"potassium {low_k[-1].comparator or ''}{fmt(low_k[-1].value or 0.0)}")
    limit24 = rules.limit_24h_high_risk if risk else rules.limit_24h
    measured = []
    for nadir, limit, window in ((nadir24, limit24, 24), (nadir48, rules.limit_48h, 48)):
        assert nadir.value is not None and current.value is not None
        if nadir.value < rules.applies_below:
            measured.append(
                _Rise(
                    nadir=nadir,
                    current=current,
                    rise=current.value - nadir.value,
                    hours=hours(nadir.effective, current.effective),
                    limit=limit,
                    window=window,
                    risk=tuple(risk) if window == 24 else (),
                    risk_words=", ".join(words) if window == 24 else "",
                )
            )
    return measured


def _rise(sodium: Sequence[LabResult], potassium: Sequence[LabResult], policy: Policy) -> _Assessment | None:
    for m in _measure(sodium, potassium, policy):
        if m.rise > m.limit:
            risk = f" (high risk: {m.risk_words})" if m.risk else ""
            return _Assessment(
                rule=Rule.SODIUM_RISE_TOO_FAST,
                priority=Priority.HIGH,
                evidence=(m.nadir.reference, m.current.reference, *m.risk),
                numbers=_numbers(m),
                sentence=(
                    f"Sodium rose {fmt(m.rise)} mmol/L in {fmt(m.hours)} h, from {fmt(m.nadir.value or 0)} "
                    f"to {fmt(m.current.value or 0)}; limit {fmt(m.limit)} mmol/L in any {m.window} h{risk}."
                ),
            )
    return None


def _projected(
    sodium: Sequence[LabResult], potassium: Sequence[LabResult], policy: Policy
) -> _Assessment | None:
    measured = _measure(sodium, potassium, policy)
    if any(m.rise > m.limit for m in measured):
        return None  # already crossed: the rise finding speaks instead
    day = next((m for m in measured if m.window == 24), None)
    if day is None or day.rise <= 0 or day.hours < policy.sodium.rise.projection_min_hours:
        return None
    rate = day.rise / day.hours
    projection = rate * 24.0
    if projection <= day.limit:
        return None
    risk = f" (high risk: {day.risk_words})" if day.risk else ""
    return _Assessment(
        rule=Rule.SODIUM_RISE_PROJECTED,
        priority=Priority.MEDIUM,
        evidence=(day.nadir.reference, day.current.reference, *day.risk),
        numbers=_numbers(day) | {"rate_per_hour": rate, "projected_24h": projection},
        sentence=(
            f"Sodium rose {fmt(day.rise)} mmol/L in {fmt(day.hours)} h from a nadir of "
            f"{fmt(day.nadir.value or 0)} ({fmt(rate)} mmol/L/h), a pace that would reach "
            f"{fmt(projection)} mmol/L in 24 h; limit {fmt(day.limit)} mmol/L in any 24 h{risk}."
        ),
    )


def _numbers(m: _Rise) -> dict[str, float]:
    return {
        "rise": m.rise,
        "hours": m.hours,
        "nadir": m.nadir.value or 0.0,
        "sodium": m.current.value or 0.0,
        "limit": m.limit,
        "window_hours": float(m.window),
        "high_risk": 1.0 if m.risk else 0.0,
    }


def _fall(sodium: Sequence[LabResult], policy: Policy) -> _Assessment | None:
    rules = policy.sodium.fall
    current = sodium[-1]
    peak = latest_max(within(sodium, current.effective, _DAY))
    assert peak.value is not None and current.value is not None
    if peak.value <= rules.applies_above:
        return None
    fall = peak.value - current.value
    span = hours(peak.effective, current.effective)
    numbers = {
        "fall": fall,
        "hours": span,
        "peak": peak.value,
        "sodium": current.value,
        "limit": rules.limit_24h,
        "max_rate_per_hour": rules.max_rate_per_hour,
    }
    base = f"Sodium fell {fmt(fall)} mmol/L in {fmt(span)} h"
    values = f"from {fmt(peak.value)} to {fmt(current.value)}"
    if fall > rules.limit_24h:
        sentence = f"{base}, {values}; limit {fmt(rules.limit_24h)} mmol/L in any 24 h."
    elif span >= rules.rate_min_hours and fall / span > rules.max_rate_per_hour:
        numbers["rate_per_hour"] = fall / span
        sentence = (
            f"{base} ({fmt(fall / span)} mmol/L/h), {values}; limit {fmt(rules.max_rate_per_hour)} "
            f"mmol/L/h over {fmt(rules.rate_min_hours)} h or more."
        )
    else:
        return None
    return _Assessment(
        rule=Rule.SODIUM_FALL_TOO_FAST,
        priority=Priority.MEDIUM,
        evidence=(peak.reference, current.reference),
        numbers=numbers,
        sentence=sentence,
    )
