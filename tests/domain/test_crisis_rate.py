"""Hyperglycaemic crisis: osmolality and glucose falling too fast, judged only during a crisis.

Limits: effective osmolality fall 8 mOsm/kg/h and glucose fall 5 mmol/L/h (Mustafa OG et al (JBDS),
Diabet Med 2023;40:e15005; also the JBDS HHS position statement, Scott AR et al, Diabet Med
2015;32:714-724, "3-8 mOsm/kg/h" [from memory]), over at least 2 h (common practice, no source),
when the starting glucose is >= 250 mg/dL (Kitabchi AE et al, Diabetes Care 2009;32:1335-1343, from
memory). Paediatric profile 3 mOsm/kg/h (Kitabchi 2009, from memory). A crisis needs, besides that
glucose, a calculated effective osmolality >= 300 or a measured osmolality >= 320 mOsm/kg (HHS
criteria of Umpierrez GE et al, Diabetes Care 2024;47:1257-1275, seen in a summary of the report)
or an insulin infusion running. Most tests below run an infusion so the gate is open.
"""

from __future__ import annotations

import pytest

from service.domain.findings import Priority, Rule
from service.domain.rules import evaluate
from service.domain.values import Specimen
from service.policy import load_policy
from tests.domain.test_support import MG_DL_PER_MMOL_L, at, glu, insulin, na, osm, timeline

ADULT = load_policy()
PAEDIATRIC = load_policy(profile="paediatric")
DRIP = insulin(-1)  # an IV insulin infusion running from before the first result


def findings(*results, p=ADULT, exposures=(DRIP,)):  # type: ignore[no-untyped-def]
    return {f.rule: f for f in evaluate(timeline(list(results), list(exposures)), p, at(100))}


def test_measured_osmolality_360_to_340_in_2h_is_falling_too_fast() -> None:
    # arithmetic: 360 -> 340 over 2 h = 10 mOsm/kg/h > 8
    start, end = osm(360, 0), osm(340, 2)
    fall = findings(start, end, glu(40, 0))[Rule.OSMOLALITY_FALL_TOO_FAST]
    assert fall.numbers["rate_per_hour"] == pytest.approx(10.0)
    assert fall.priority is Priority.MEDIUM
    assert {start.reference, end.reference} <= set(fall.evidence)
    assert fall.sentence.startswith(
        "Effective osmolality (measured) fell 20 mOsm/kg in 2 h (10 mOsm/kg/h), from 360 to 340"
    )


def test_glucose_40_to_28_in_2h_is_falling_too_fast() -> None:
    # arithmetic: 40 -> 28 mmol/L over 2 h = 6 mmol/L/h > 5
    fall = findings(glu(40, 0), glu(28, 2))[Rule.GLUCOSE_FALL_TOO_FAST]
    assert fall.numbers["rate_per_hour"] == pytest.approx(6.0)
    assert fall.numbers["limit"] == 5


@pytest.mark.parametrize(("end", "flagged"), [(344.0, False), (343.9, True)])
def test_osmolality_limit_of_8_per_hour_is_exclusive(end: float, flagged: bool) -> None:
    assert (Rule.OSMOLALITY_FALL_TOO_FAST in findings(osm(360, 0), osm(end, 2), glu(40, 0))) is flagged


@pytest.mark.parametrize(("end", "flagged"), [(30.0, False), (29.9, True)])
def test_glucose_limit_of_5_per_hour_is_exclusive(end: float, flagged: bool) -> None:
    assert (Rule.GLUCOSE_FALL_TOO_FAST in findings(glu(40, 0), glu(end, 2))) is flagged


def test_a_fall_over_less_than_2h_is_not_measured() -> None:
    assert Rule.GLUCOSE_FALL_TOO_FAST not in findings(glu(40, 0), glu(30, 1.9))


def test_a_fall_over_exactly_2h_is_measured() -> None:
    assert Rule.GLUCOSE_FALL_TOO_FAST in findings(glu(40, 0), glu(28, 2.0))


@pytest.mark.parametrize(
    ("start", "flagged"),
    [
        (250 / MG_DL_PER_MMOL_L, True),  # exactly 250 mg/dL (13.877 mmol/L): inside, as 13.9 is
        (13.9, True),
        (249.9 / MG_DL_PER_MMOL_L, False),
        (13.8, False),
    ],
)
def test_glucose_rule_applies_from_a_starting_glucose_of_250_mg_dl(start: float, flagged: bool) -> None:
    # Kitabchi 2009 (from memory): 250 mg/dL, inclusive; the policy writes it in mg/dL and compares exactly
    assert (Rule.GLUCOSE_FALL_TOO_FAST in findings(glu(start, 0), glu(start - 10.1, 2))) is flagged


def test_osmolality_rule_needs_a_high_starting_glucose() -> None:
    assert Rule.OSMOLALITY_FALL_TOO_FAST not in findings(osm(360, 0), osm(340, 2), glu(8, 0))


def test_censored_high_glucose_counts_as_a_high_start_for_osmolality() -> None:
    assert Rule.OSMOLALITY_FALL_TOO_FAST in findings(
        osm(360, 0), osm(340, 2), glu(33.3, 0, comparator=">")
    )


def test_effective_osmolality_is_calculated_when_none_was_measured() -> None:
    # Kitabchi 2009 (ADA) definition: effective = 2 Na + glucose.
    # 2*140 + 40 = 320 -> 2*141 + 18 = 300 in 2 h: 10 mOsm/kg/h
    fall = findings(na(140, 0), glu(40, 0.1), na(141, 2), glu(18, 2.1))[Rule.OSMOLALITY_FALL_TOO_FAST]
    assert fall.numbers["start"] == pytest.approx(320.0)
    assert fall.numbers["current"] == pytest.approx(300.0)
    assert "(calculated)" in fall.sentence


def test_measured_and_calculated_osmolality_are_never_mixed_in_one_rate() -> None:
    # measured 330 (includes urea) then only 2*140 + 30 = 310: the fall is only the missing urea
    assert Rule.OSMOLALITY_FALL_TOO_FAST not in findings(osm(330, 0), glu(30, 0), na(140, 2), glu(30, 2))


def test_a_later_calculated_point_does_not_hide_a_measured_fall() -> None:
    # arithmetic (360 -> 340 mOsm/kg over 2 h = 10/h > 8), then a sodium and a
    # glucose drawn 40 min later with no measured osmolality: the measured series still decides.
    fall = findings(osm(360, 0), glu(40, 0), osm(340, 2), na(150, 2.67), glu(30, 2.67))
    assert fall[Rule.OSMOLALITY_FALL_TOO_FAST].sentence.startswith("Effective osmolality (measured)")


def test_falling_glucose_sentence_shows_corrected_sodium_when_glucose_is_high() -> None:
    # Katz 1973: Na 130 with glucose 28 -> 130 + 1.6*(28-5.55074)/5.55074
    expected = 130 + 1.6 * (28 - 5.55074) / 5.55074
    fall = findings(glu(40, 0), glu(28, 2), na(130, 2))[Rule.GLUCOSE_FALL_TOO_FAST]
    assert fall.numbers["corrected_sodium"] == pytest.approx(expected, abs=1e-3)
    assert f"glucose-corrected sodium {expected:.1f} mmol/L" in fall.sentence


def test_falling_glucose_sentence_omits_corrected_sodium_once_glucose_is_low() -> None:
    fall = findings(glu(25, 0), glu(12, 2), na(130, 2))[Rule.GLUCOSE_FALL_TOO_FAST]
    assert "corrected" not in fall.sentence


def test_point_of_care_glucose_feeds_the_glucose_rate_by_default() -> None:
    poc = Specimen.POINT_OF_CARE
    assert Rule.GLUCOSE_FALL_TOO_FAST in findings(glu(40, 0, specimen=poc), glu(28, 2, specimen=poc))


def test_paediatric_profile_flags_an_osmolality_fall_of_4_per_hour() -> None:
    # Kitabchi 2009 (from memory): <=3 mOsm/kg/h; 4/h passes the adult 8/h
    results = (osm(360, 0), osm(352, 2), glu(40, 0))
    assert Rule.OSMOLALITY_FALL_TOO_FAST in findings(*results, p=PAEDIATRIC)
    assert Rule.OSMOLALITY_FALL_TOO_FAST not in findings(*results, p=ADULT)


def test_rate_is_measured_over_the_latest_span_of_at_least_2h() -> None:
    # 40 -> 39 (slow) then 39 -> 27 in 2 h: 6/h from the point 2 h back
    fall = findings(glu(40, 0), glu(39, 1), glu(27, 3))[Rule.GLUCOSE_FALL_TOO_FAST]
    assert fall.numbers["start"] == 39
    assert fall.numbers["hours"] == 2


def test_a_ward_patients_high_glucose_falling_to_normal_is_not_a_crisis() -> None:
    # Glucose 16 -> 5 in 2 h (5.5/h > 5) with sodium 138: effective osmolality 2*138 + 16 = 292 < 300,
    # no insulin infusion: the crisis-rate rules stand aside.
    results = (glu(16, 0), na(138, 0), glu(5, 2), na(138, 2))
    assert Rule.GLUCOSE_FALL_TOO_FAST not in findings(*results, exposures=())


@pytest.mark.parametrize(("sodium", "flagged"), [(130.0, True), (129.95, False)])
def test_a_calculated_effective_osmolality_of_300_opens_the_crisis_gate(sodium: float, flagged: bool) -> None:
    # 2*130 + 40 = 300 mOsm/kg: at the HHS threshold (Umpierrez 2024), inclusive; 299.9 is not
    results = (glu(40, 0), na(sodium, 0), glu(28, 2))
    assert (Rule.GLUCOSE_FALL_TOO_FAST in findings(*results, exposures=())) is flagged


@pytest.mark.parametrize(("measured", "flagged"), [(320.0, True), (319.9, False)])
def test_a_measured_osmolality_of_320_opens_the_crisis_gate(measured: float, flagged: bool) -> None:
    # Umpierrez 2024 HHS: total (measured) serum osmolality 320 mOsm/kg
    results = (glu(40, 0), osm(measured, 0), glu(28, 2))
    assert (Rule.GLUCOSE_FALL_TOO_FAST in findings(*results, exposures=())) is flagged


def test_an_insulin_infusion_with_a_high_glucose_opens_the_crisis_gate() -> None:
    results = (glu(40, 0), glu(28, 2))
    assert Rule.GLUCOSE_FALL_TOO_FAST in findings(*results, exposures=(insulin(-1),))
    assert Rule.GLUCOSE_FALL_TOO_FAST not in findings(*results, exposures=())


def test_an_infusion_started_after_the_span_began_does_not_open_the_gate() -> None:
    # The crisis is judged where the fall is measured from; insulin from 1 h is not running at 0 h.
    results = (glu(40, 0), glu(28, 2))
    assert Rule.GLUCOSE_FALL_TOO_FAST not in findings(*results, exposures=(insulin(1),))
