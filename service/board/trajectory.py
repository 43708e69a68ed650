"""A patient's trajectory for the board's chart: the four analytes on one time axis. Pure.

Everything is in each analyte's canonical unit (mmol/L; mOsm/kg for osmolality), the unit the
policy's limits are written in, so a band and a point can be compared by eye. The chart marks what
a reviewer needs to explain the Flag: its evidence, results that may be specimen artefacts, the
glucose-corrected sodium the sodium rules judged, insulin therapy, and the change the Flag is about.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import datetime, timedelta
from typing import Any

from service.domain.derived import judged_corrected_sodium
from service.domain.rules.series import LAB_BLOOD
from service.domain.values import Analyte, LabResult, Specimen, Timeline
from service.policy.model import Policy

__all__ = ["PANELS", "rate_words", "trajectory"]

PANELS: tuple[tuple[Analyte, str, str], ...] = (
    (Analyte.SODIUM, "Sodium", "mmol/L"),
    (Analyte.POTASSIUM, "Potassium", "mmol/L"),
    (Analyte.GLUCOSE, "Glucose", "mmol/L"),
    (Analyte.OSMOLALITY, "Osmolality", "mOsm/kg"),
)
_DOSE_SHADE = timedelta(minutes=15)  # a single dose drawn as a narrow band, so it stays visible


def _ms(t: datetime) -> int:
    return int(t.timestamp() * 1000)


def trajectory(timeline: Timeline, policy: Policy, evidence: Sequence[str], suspects: Mapping[str, str]) -> dict[
        str, Any]:
    """The chart's data: one panel per analyte, insulin periods, and the window they share."""
    cited = {ref.split("/_history/")[0] for ref in evidence if ref.startswith("Observation/")}
    corrected = _corrected(timeline, policy)
    panels = []
    for analyte, label, unit in PANELS:
        results = [r for r in timeline.of(analyte) if r.value is not None and r.specimen is not Specimen.URINE]
        points = [{
            "x": _ms(r.effective), "y": r.value, "ref": r.reference, "specimen": r.specimen.value,
            "comparator": r.comparator, "evidence": f"Observation/{r.observation_id}" in cited,
            "suspect": suspects.get(r.reference),
        } for r in results]
        panel: dict[str, Any] = {"analyte": analyte.value, "label": label, "unit": unit, "points": points,
                                 "bands": _bands(policy, analyte, unit), "rate": None}
        if analyte is Analyte.SODIUM:
            panel["corrected"] = [{"x": _ms(r.effective), "y": round(corrected[r.reference], 1)}
                                  for r in results if r.reference in corrected]
        panel["rate"] = _rate(results, cited, corrected if analyte is Analyte.SODIUM else {}, unit)
        panels.append(panel)
    return {"window": {"start": _ms(timeline.window_start), "end": _ms(timeline.window_end)},
            "panels": panels, "insulin": _insulin(timeline)}


def _corrected(timeline: Timeline, policy: Policy) -> dict[str, float]:
    """Glucose-corrected sodium where the sodium rules judge it in place of the measured one."""
    glucose = timeline.of(Analyte.GLUCOSE, *LAB_BLOOD)
    out: dict[str, float] = {}
    for na in timeline.of(Analyte.SODIUM):
        judged = judged_corrected_sodium(na, glucose, policy) if na.comparator is None else None
        if judged is not None:
            out[na.reference] = judged[0]
    return out


def _bands(policy: Policy, analyte: Analyte, unit: str) -> list[dict[str, Any]]:
    limit = policy.level_for(analyte, Specimen.SERUM_PLASMA)
    if limit is None:
        return []
    return [{"from": None, "to": limit.low, "label": f"dangerous low ≤ {_fmt(limit.low)} {unit}"},
            {"from": limit.high, "to": None, "label": f"dangerous high ≥ {_fmt(limit.high)} {unit}"}]


def _rate(results: Sequence[LabResult], cited: set[str], corrected: Mapping[str, float],
          unit: str) -> dict[str, Any] | None:
    """The change across the Flag's evidence in this analyte, first to last, as the Flag judged it."""
    own = [r for r in results if f"Observation/{r.observation_id}" in cited and r.value is not None]
    if len(own) < 2:
        return None
    first, last = own[0], own[-1]
    use_corrected = all(r.reference in corrected for r in (first, last))
    y0 = corrected[first.reference] if use_corrected else first.value
    y1 = corrected[last.reference] if use_corrected else last.value
    assert y0 is not None and y1 is not None
    words = rate_words(y1 - y0, last.effective - first.effective, unit)
    return {"x0": _ms(first.effective), "y0": round(y0, 1), "x1": _ms(last.effective), "y1": round(y1, 1),
            "label": f"{words} (glucose-corrected)" if use_corrected else words}


def rate_words(change: float, span: timedelta, unit: str) -> str:
    """"+11 mmol/L in 24 h": the signed change and the time it took."""
    hours = span.total_seconds() / 3600
    taken = f"{round(hours)} h" if hours >= 10 else f"{hours:.1f} h".replace(".0 h", " h")
    if hours < 1:
        taken = f"{round(hours * 60)} min"
    return f"{'+' if change >= 0 else '−'}{_fmt(abs(change))} {unit} in {taken}"


def _insulin(timeline: Timeline) -> list[dict[str, Any]]:
    periods = []
    for x in timeline.exposures:
        start = max(x.start, timeline.window_start)
        end = x.end if x.end is not None else timeline.window_end
        if end <= x.start:
            end = x.start + _DOSE_SHADE
        kind = "IV insulin" if x.route == "intravenous" else f"insulin, {x.route or 'route not sent'}"
        periods.append({"from": _ms(start), "to": _ms(min(end, timeline.window_end)), "label": kind,
                        "running": x.end is None})
    return periods


def _fmt(value: float) -> str:
    text = f"{value:.1f}"
    return text[:-2] if text.endswith(".0") else text
