"""Sodium rules judge tonicity, like with like, and never a rate over no time.

Check values and sources:
- glucose-corrected sodium Na + 1.6 x (glucose - 5.55074)/5.55074 mmol/L (Katz MA, N Engl J Med
  1973;289:843-844), judged when the paired glucose is >= 250 mg/dL (Kitabchi 2009, from memory);
- rise limits 10/24 h (Spasovski G et al, Eur J Endocrinol 2014;170:G1-G47, from memory), applied to
  hypotonic hyponatraemia only: measured osmolality < 275 mOsm/kg (Spasovski 2014, from memory);
  8 in each later 24 h as a policy option (Spasovski 2014, from memory);
- corrected sodium falling in a crisis: adults 10 mmol/L in 24 h (Mustafa OG et al (JBDS), Diabet Med
  2023;40:e15005, from memory); children 4 (ISPAD 2022 names the sign without a number; 4 = common
  practice, no source); crisis = glucose >= 250 mg/dL with effective osmolality >= 300 (Umpierrez GE
  et al, Diabetes Care 2024;47:1257-1275);
- direct (whole-blood) vs indirect (laboratory) sodium differ by about 2 and up to about 6 mmol/L
  (Story DA et al, Anesth Analg 2007;104:893-897, from memory); allowance 4 = common practice.
"""

from __future__ import annotations

import pytest

from service.domain.derived import corrected_sodium
from service.domain.findings import Priority, Rule
from service.domain.rules import evaluate
from service.domain.values import Specimen
from service.policy import load_policy
from tests.domain.test_support import at, glu, na, osm, policy, timeline

ADULT = load_policy()
CHILD = load_policy(profile="paediatric")
WB = Specimen.WHOLE_BLOOD


def findings(*results, p=ADULT):  # type: ignore[no-untyped-def]
    return {f.rule: f for f in evaluate(timeline(list(results)), p, at(100))}


# ---- hyperglycaemia: corrected sodium ---------------------------------------------------------


def test_measured_sodium_rising_as_glucose_falls_with_flat_corrected_sodium_raises_no_rise() -> None:
    # DKA: Na 122 with glucose 44 -> corrected 122 + 1.6*(44-5.55)/5.55 = 133.1; 20 h later Na 133
    # with glucose 10 (below 250 mg/dL, so measured is judged): 133. Measured rose 11, tonicity did not.
    assert corrected_sodium(122, 44) == pytest.approx(133.08, abs=0.01)
    result = findings(na(122, 0), glu(44, 0), na(133, 20), glu(10, 20))
    assert Rule.SODIUM_RISE_TOO_FAST not in result
    assert Rule.SODIUM_RISE_PROJECTED not in result


def test_a_rise_of_corrected_sodium_is_flagged_and_says_it_is_corrected() -> None:
    # Na 112 with glucose 30 -> 119.05; Na 125 with glucose 28 -> 131.47: corrected rise 12.4 > 10
    nadir, g0, now, g1 = na(112, 0), glu(30, 0), na(125, 20), glu(28, 20)
    rise = findings(nadir, g0, now, g1)[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.numbers["rise"] == pytest.approx(corrected_sodium(125, 28) - corrected_sodium(112, 30))
    assert rise.numbers["corrected"] == 1.0
    assert rise.sentence.startswith("Glucose-corrected sodium rose 12.4 mmol/L in 20 h, from 119 to 131.5")
    assert "(measured 112 to 125)" in rise.sentence
    assert {nadir.reference, g0.reference, now.reference, g1.reference} <= set(rise.evidence)


@pytest.mark.parametrize(("measured", "flagged"), [(275.0, False), (274.9, True)])
def test_the_rise_rule_stands_down_when_the_nadir_is_not_hypotonic(measured: float, flagged: bool) -> None:
    # Spasovski 2014 (from memory): hypotonic hyponatraemia is measured osmolality < 275 mOsm/kg
    result = findings(na(118, 0), osm(measured, 0), na(129, 20))
    assert (Rule.SODIUM_RISE_TOO_FAST in result) is flagged


def test_corrected_sodium_falling_during_a_crisis_is_flagged_even_below_145() -> None:
    # Na 130 with glucose 40 -> corrected 139.9, effective osmolality 2*130+40 = 300 (crisis);
    # 12 h later Na 128 with glucose 12 (measured judged): a fall of 11.9 > 10
    peak, g0, now = na(130, 0), glu(40, 0), na(128, 12)
    fall = findings(peak, g0, now, glu(12, 12))[Rule.SODIUM_FALL_IN_CRISIS]
    assert fall.numbers["fall"] == pytest.approx(corrected_sodium(130, 40) - 128)
    assert fall.priority is Priority.MEDIUM
    assert "during a hyperglycaemic crisis (effective osmolality 300 mOsm/kg)" in fall.sentence
    assert {peak.reference, g0.reference, now.reference} <= set(fall.evidence)


@pytest.mark.parametrize(("now_na", "flagged"), [(129.9, False), (129.8, True)])
def test_the_crisis_fall_limit_of_10_is_exclusive(now_na: float, flagged: bool) -> None:
    # corrected 139.9 (Na 130, glucose 40): falls of 9.9+ and 10.1 mmol/L
    peak = corrected_sodium(130, 40)
    value = now_na + (peak - 139.9)  # exact fall of 139.9 - now_na
    result = findings(na(130, 0), glu(40, 0), na(value, 12), glu(12, 12))
    assert (Rule.SODIUM_FALL_IN_CRISIS in result) is flagged


def test_a_childs_corrected_sodium_falling_4_is_high_priority() -> None:
    # Na 135 with glucose 30 -> 142.05 (2*135+30 = 300: crisis); 10 h later 137 with glucose 12: fall 5.05 > 4
    fall = findings(na(135, 0), glu(30, 0), na(137, 10), glu(12, 10), p=CHILD)[Rule.SODIUM_FALL_IN_CRISIS]
    assert fall.priority is Priority.HIGH
    assert Rule.SODIUM_FALL_IN_CRISIS not in findings(na(135, 0), glu(30, 0), na(137, 10), glu(12, 10))


def test_a_falling_sodium_outside_a_crisis_is_not_a_crisis_fall() -> None:
    # Na 130 with glucose 15 (corrected 132.7): effective osmolality 275 < 300, no insulin
    assert Rule.SODIUM_FALL_IN_CRISIS not in findings(na(130, 0), glu(15, 0), na(120, 12), glu(5, 12))


def test_one_fall_raises_one_flag_the_crisis_fall_speaks_for_it() -> None:
    # Na 140 with glucose 40 -> 149.9 (> 145, hypernatraemic too); 12 h later 136: both rules would fire
    result = findings(na(140, 0), glu(40, 0), na(136, 12), glu(12, 12))
    assert Rule.SODIUM_FALL_IN_CRISIS in result
    assert Rule.SODIUM_FALL_TOO_FAST not in result


def test_a_fall_that_began_in_a_crisis_is_not_judged_by_the_hypernatraemia_rate() -> None:
    # corrected 149.9 -> 144 in 10 h: 5.9 (0.59/h > 0.5/h) but under the crisis limit of 10
    result = findings(na(140, 0), glu(40, 0), na(144, 10), glu(12, 10))
    assert Rule.SODIUM_FALL_TOO_FAST not in result
    assert Rule.SODIUM_FALL_IN_CRISIS not in result


# ---- like with like ----------------------------------------------------------------------------


def test_interleaved_whole_blood_and_lab_sodium_make_no_rate_from_method_bias_alone() -> None:
    # Lab 120, gas 124, lab 121, gas 125, lab 122, gas 131: the gas reads ~4 higher; no same-method
    # rise exceeds 10 and the largest cross-method rise, 131 - 120 = 11, is 7 beyond the allowance.
    results = [na(120, 0), na(124, 2, specimen=WB), na(121, 4), na(125, 6, specimen=WB), na(122, 8),
               na(131, 10, specimen=WB)]
    result = findings(*results)
    assert Rule.SODIUM_RISE_TOO_FAST not in result


@pytest.mark.parametrize(("gas", "flagged"), [(134.0, False), (134.1, True)])
def test_a_cross_method_rise_counts_beyond_limit_plus_allowance(gas: float, flagged: bool) -> None:
    # lab 120 -> gas 134.1: 14.1 - 4 = 10.1 > 10
    rise = findings(na(120, 0), na(gas, 20, specimen=WB)).get(Rule.SODIUM_RISE_TOO_FAST)
    assert (rise is not None) is flagged
    if rise is not None:
        assert "whole-blood and laboratory sodium compared with a 4 mmol/L method allowance" in rise.sentence
        assert rise.numbers["method_allowance"] == 4.0


def test_a_same_method_rise_needs_no_allowance() -> None:
    assert Rule.SODIUM_RISE_TOO_FAST in findings(na(120, 0, specimen=WB), na(130.1, 20, specimen=WB))


def test_a_cross_method_fall_counts_beyond_limit_plus_allowance() -> None:
    # gas 163 -> lab 152 in 23 h: 11 - 4 = 7, under 10 and under 0.5/h
    assert Rule.SODIUM_FALL_TOO_FAST not in findings(na(163, 0, specimen=WB), na(152, 23))
    assert Rule.SODIUM_FALL_TOO_FAST in findings(na(166.1, 0, specimen=WB), na(152, 23))


# ---- ties: no rate over no time ------------------------------------------------------------------


@pytest.mark.parametrize("ids", [("a", "b"), ("b", "a")])
def test_two_sodiums_at_one_instant_make_no_rate_and_the_critical_one_stands(ids: tuple[str, str]) -> None:
    # 118 is at or below the critical 120 (RCPath G158 2017); 140 drawn at the same instant
    low, normal = na(118, 5, obs_id=ids[0]), na(140, 5, obs_id=ids[1])
    result = findings(low, normal)
    assert Rule.SODIUM_RISE_TOO_FAST not in result
    assert Rule.SODIUM_CRITICAL_LOW in result
    assert result[Rule.SODIUM_CRITICAL_LOW].numbers["value"] == 118


# ---- the European later-day limit ---------------------------------------------------------------


def test_the_later_day_limit_of_8_is_a_policy_option() -> None:
    # 110 -> 118 in the first 24 h (8), then 118 -> 127 in the next 24 h (9; 17 in 48 h, under 18)
    results = (na(110, 0), na(118, 24), na(127, 48))
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(*results)
    european = policy(sodium={"rise": ADULT.sodium.rise.model_copy(update={"limit_24h_after_first_day": 8.0})})
    rise = findings(*results, p=european)[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.numbers["limit"] == 8.0
    assert rise.numbers["nadir"] == 118
