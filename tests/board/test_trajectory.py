"""The trajectory chart's data: every mark on it is one a reviewer can check by hand."""

# Sodium limits 120/160 mmol/L and potassium 2.5/6.5 mmol/L are the default policy's dangerous levels
# (RCPath G158, 2017). The glucose correction is Katz's: sodium falls 1.6 mmol/L per 100 mg/dL of
# glucose above 100 mg/dL (Katz MA, N Engl J Med 1973;289:843-844); 600 mg/dL is 33.30 mmol/L at
# 180.156 g/mol (IUPAC atomic weights), so a measured 125 corrects to 125 + 1.6 x 5 = 133.0.

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from service.board.trajectory import rate_words, trajectory
from service.domain.values import Analyte, InsulinExposure, LabResult, ResultStatus, Specimen, Timeline
from service.policy import load_policy

END = datetime(2026, 3, 3, 0, 0, tzinfo=UTC)
POLICY = load_policy(None)
MG_DL_PER_MMOL_L_GLUCOSE = 18.0156  # 180.156 g/mol / 10


def result(oid: str, analyte: Analyte, value: float, hours_before_end: float,
           specimen: Specimen = Specimen.SERUM_PLASMA) -> LabResult:
    loinc = {"sodium": "2951-2", "potassium": "2823-3", "glucose": "2345-7", "osmolality": "2692-2"}[analyte.value]
    return LabResult(observation_id=oid, version=1, patient="p", analyte=analyte, specimen=specimen, loinc=loinc,
                     status=ResultStatus.FINAL, effective=END - timedelta(hours=hours_before_end), value=value,
                     key=f"lab|{oid}")


def timeline(*results: LabResult, exposures: tuple[InsulinExposure, ...] = ()) -> Timeline:
    return Timeline(patient="p", window_start=END - timedelta(hours=72), window_end=END,
                    results=tuple(sorted(results, key=lambda r: r.order_key)), exposures=exposures)


def panel(chart: dict[str, object], analyte: str) -> dict[str, object]:
    return next(p for p in chart["panels"] if p["analyte"] == analyte)  # type: ignore[attr-defined, index]


def test_sodium_with_a_high_glucose_is_shown_corrected_beside_the_measured_value() -> None:
    chart = trajectory(timeline(result("na", Analyte.SODIUM, 125, 2),
                                result("glu", Analyte.GLUCOSE, 600 / MG_DL_PER_MMOL_L_GLUCOSE, 2)), POLICY, [], {})
    assert panel(chart, "sodium")["corrected"] == [{"x": int((END - timedelta(hours=2)).timestamp() * 1000),
                                                    "y": pytest.approx(133.0, abs=0.05)}]


def test_sodium_with_glucose_below_the_policys_threshold_is_not_corrected() -> None:
    # 200 mg/dL is below the policy's 250 mg/dL (service/policy/default.toml, derived.corrected_sodium_from_glucose).
    chart = trajectory(timeline(result("na", Analyte.SODIUM, 125, 2),
                                result("glu", Analyte.GLUCOSE, 200 / MG_DL_PER_MMOL_L_GLUCOSE, 2)), POLICY, [], {})
    assert panel(chart, "sodium")["corrected"] == []


def test_a_meter_glucose_does_not_correct_the_charted_sodium() -> None:
    # The sodium rules pair sodium with laboratory glucose only (service/domain/rules/series.py LAB_BLOOD);
    # the chart shows the sodium they judged, so a point-of-care glucose corrects nothing there either.
    chart = trajectory(timeline(result("na", Analyte.SODIUM, 125, 2),
                                result("glu", Analyte.GLUCOSE, 600 / MG_DL_PER_MMOL_L_GLUCOSE, 2,
                                       Specimen.POINT_OF_CARE)), POLICY, [], {})
    assert panel(chart, "sodium")["corrected"] == []


def test_the_policys_dangerous_levels_are_the_bands() -> None:
    bands = panel(trajectory(timeline(), POLICY, [], {}), "sodium")["bands"]
    assert [(b["from"], b["to"]) for b in bands] == [(None, 120), (160, None)]  # type: ignore[index]
    k = panel(trajectory(timeline(), POLICY, [], {}), "potassium")["bands"]
    assert [(b["from"], b["to"]) for b in k] == [(None, 2.5), (6.5, None)]  # type: ignore[index]


def test_the_flags_evidence_and_suspect_results_are_marked() -> None:
    a, b, c = (result("a", Analyte.POTASSIUM, 3.0, 10), result("b", Analyte.POTASSIUM, 6.9, 5),
               result("c", Analyte.POTASSIUM, 3.1, 1))
    chart = trajectory(timeline(a, b, c), POLICY, ["Observation/a/_history/1", "Observation/c/_history/1"],
                       {b.reference: "sample haemolysed"})
    points = panel(chart, "potassium")["points"]
    assert [(p["evidence"], p["suspect"]) for p in points] == [  # type: ignore[index]
        (True, None), (False, "sample haemolysed"), (True, None)]


def test_the_change_the_flag_is_about_is_annotated_from_its_first_to_its_last_evidence() -> None:
    # The demo's ward-05: 123 then 134 mmol/L 24 h apart (fixtures/demo/README.md, invented data).
    first, last = result("a", Analyte.SODIUM, 123, 30), result("b", Analyte.SODIUM, 134, 6)
    rate = panel(trajectory(timeline(first, last), POLICY, [first.reference, last.reference], {}), "sodium")["rate"]
    assert rate["label"] == "+11 mmol/L in 24 h"  # type: ignore[index]


def test_a_rate_judged_on_corrected_sodium_is_drawn_and_named_so() -> None:
    glucose = 600 / MG_DL_PER_MMOL_L_GLUCOSE
    na1, na2 = result("a", Analyte.SODIUM, 125, 20), result("b", Analyte.SODIUM, 120, 4)
    chart = trajectory(timeline(na1, na2, result("g1", Analyte.GLUCOSE, glucose, 20),
                                result("g2", Analyte.GLUCOSE, glucose, 4)), POLICY, [na1.reference, na2.reference], {})
    assert panel(chart, "sodium")["rate"]["label"] == "−5 mmol/L in 16 h (glucose-corrected)"  # type: ignore[index]


def test_a_single_evidence_result_has_no_rate() -> None:
    only = result("a", Analyte.SODIUM, 118, 2)
    assert panel(trajectory(timeline(only), POLICY, [only.reference], {}), "sodium")["rate"] is None


def test_urine_results_are_never_drawn_on_the_serum_chart() -> None:
    chart = trajectory(timeline(result("u", Analyte.SODIUM, 40, 2, Specimen.URINE)), POLICY, [], {})
    assert panel(chart, "sodium")["points"] == []


def test_a_running_insulin_infusion_is_shaded_to_the_end_of_the_window() -> None:
    drip = InsulinExposure(source_id="m", version=1, patient="p", start=END - timedelta(hours=6), end=None,
                           route="intravenous", status="in-progress", medication="http://snomed.info/sct|47625008")
    periods = trajectory(timeline(exposures=(drip,)), POLICY, [], {})["insulin"]
    assert periods == [{"from": int(drip.start.timestamp() * 1000), "to": int(END.timestamp() * 1000),
                        "label": "IV insulin", "running": True}]


@pytest.mark.parametrize(("change", "span", "words"), [
    (11, timedelta(hours=24), "+11 mmol/L in 24 h"), (-12, timedelta(hours=20), "−12 mmol/L in 20 h"),
    (2.5, timedelta(hours=2, minutes=30), "+2.5 mmol/L in 2.5 h"), (1, timedelta(minutes=30), "+1 mmol/L in 30 min"),
    (0, timedelta(hours=4), "+0 mmol/L in 4 h"),
])
def test_rates_read_as_a_signed_change_over_a_time(change: float, span: timedelta, words: str) -> None:
    assert rate_words(change, span, "mmol/L") == words
