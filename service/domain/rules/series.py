"""Small helpers the rule families share: censored values, windows, episode starts, wording.

Pure functions over value objects; no I/O.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from datetime import datetime, timedelta
from enum import Enum

from service.domain.values import Analyte, LabResult, Specimen

__all__ = [
    "LAB_BLOOD",
    "UNITS",
    "Verdict",
    "at_least",
    "at_or_above",
    "at_or_below",
    "below",
    "exact",
    "fmt",
    "hours",
    "shown",
    "latest_max",
    "latest_min",
    "trailing_run_start",
    "within",
]

# Laboratory blood specimens: meters and strips are left out where a rate or a risk is judged.
LAB_BLOOD = (Specimen.SERUM_PLASMA, Specimen.WHOLE_BLOOD)

UNITS = {
    Analyte.SODIUM: "mmol/L",
    Analyte.POTASSIUM: "mmol/L",
    Analyte.GLUCOSE: "mmol/L",
    Analyte.UREA: "mmol/L",
    Analyte.CALCIUM: "mmol/L",
    Analyte.OSMOLALITY: "mOsm/kg",
}


class Verdict(Enum):
    """What one result proves about one side of one limit."""

    DANGER = "danger"
    SAFE = "safe"
    UNKNOWN = "unknown"  # a censored value whose bound proves neither


def at_or_below(result: LabResult, limit: float) -> Verdict:
    """Does the result prove value <= limit (DANGER) or value > limit (SAFE)?"""
    v, c = result.value, result.comparator
    if v is None:
        return Verdict.UNKNOWN
    if c is None:
        return Verdict.DANGER if v <= limit else Verdict.SAFE
    if c in ("<", "<="):
        return Verdict.DANGER if v <= limit else Verdict.UNKNOWN
    if c == ">":
        return Verdict.SAFE if v >= limit else Verdict.UNKNOWN
    if c == ">=":
        return Verdict.SAFE if v > limit else Verdict.UNKNOWN
    return Verdict.UNKNOWN


def at_or_above(result: LabResult, limit: float) -> Verdict:
    """Does the result prove value >= limit (DANGER) or value < limit (SAFE)?"""
    v, c = result.value, result.comparator
    if v is None:
        return Verdict.UNKNOWN
    if c is None:
        return Verdict.DANGER if v >= limit else Verdict.SAFE
    if c in (">", ">="):
        return Verdict.DANGER if v >= limit else Verdict.UNKNOWN
    if c == "<":
        return Verdict.SAFE if v <= limit else Verdict.UNKNOWN
    if c == "<=":
        return Verdict.SAFE if v < limit else Verdict.UNKNOWN
    return Verdict.UNKNOWN


def below(result: LabResult, limit: float) -> Verdict:
    """Does the result prove value < limit (DANGER) or value >= limit (SAFE)?"""
    v, c = result.value, result.comparator
    if v is None:
        return Verdict.UNKNOWN
    if c is None:
        return Verdict.DANGER if v < limit else Verdict.SAFE
    if c == "<":
        return Verdict.DANGER if v <= limit else Verdict.UNKNOWN
    if c == "<=":
        return Verdict.DANGER if v < limit else Verdict.UNKNOWN
    if c in (">", ">="):
        return Verdict.SAFE if v >= limit else Verdict.UNKNOWN
    return Verdict.UNKNOWN


def at_least(result: LabResult, limit: float) -> bool:
    """Whether the result proves value >= limit (a censored ">33.3" proves it for 13.9)."""
    return at_or_above(result, limit) is Verdict.DANGER


def exact(results: Iterable[LabResult]) -> tuple[LabResult, ...]:
    """Results with an uncensored number: the only ones a rise, fall or rate can be measured on."""
    return tuple(r for r in results if r.value is not None and r.comparator is None)


def hours(start: datetime, end: datetime) -> float:
    return (end - start).total_seconds() / 3600.0


def within(results: Sequence[LabResult], end: datetime, span: timedelta) -> list[LabResult]:
    """Results drawn in [end - span, end], both ends inclusive."""
    return [r for r in results if end - span <= r.effective <= end]


def latest_min(results: Sequence[LabResult]) -> LabResult:
    """The lowest value; of equal lows the latest, since a rise is measured from where it began."""
    best = results[0]
    for r in results[1:]:
        if r.value is not None and best.value is not None and r.value <= best.value:
            best = r
    return best


def latest_max(results: Sequence[LabResult]) -> LabResult:
    """The highest value; of equal highs the latest."""
    best = results[0]
    for r in results[1:]:
        if r.value is not None and best.value is not None and r.value >= best.value:
            best = r
    return best


def trailing_run_start(count: int, fires: Callable[[int], bool]) -> int | None:
    """Index where the run of consecutive firing points that ends at the last point begins.

    None when the last point does not fire. An episode is that run: it began when the condition
    last became true, which any replay of the same data finds again.
    """
    if count == 0 or not fires(count - 1):
        return None
    start = count - 1
    while start > 0 and fires(start - 1):
        start -= 1
    return start


def fmt(value: float) -> str:
    """A number for a sentence: at most one decimal, no trailing ".0"."""
    text = f"{value:.1f}"
    text = text[:-2] if text.endswith(".0") else text
    return "0" if text == "-0" else text


def shown(result: LabResult) -> str:
    """A result's value for a sentence, in the unit the lab sent with the canonical value beside it:
    "600 mg/dL (33.3 mmol/L)"; "7.1 mmol/L" when it was sent in the canonical unit (or its unit is not
    known). A censored value keeps its comparator in both."""
    unit = UNITS[result.analyte]
    sign = result.comparator or ""
    canonical = f"{sign}{fmt(result.value or 0.0)} {unit}"
    if result.sent_value is None or not result.sent_unit or result.sent_unit.lower() == unit.lower():
        return canonical
    return f"{sign}{fmt(result.sent_value)} {result.sent_unit} ({canonical})"
