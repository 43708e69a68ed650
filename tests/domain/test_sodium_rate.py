"""Sodium correction rates.

Limits: rise >10 mmol/L in 24 h (Spasovski 2014 EU guideline, from
memory), >8 in 24 h when high risk (Verbalis 2013 US panel, from memory), >18 in 48 h (Verbalis 2013,
corroborated by Tandukar 2021), only while the nadir is below 130 (Spasovski 2014, from memory);
high-risk features nadir <=105 or hypokalaemia (Verbalis 2013, from memory). Fall >10 mmol/L in 24 h
or >0.5 mmol/L/h (Adrogué & Madias 2000, from memory), sustained >=4 h (common practice, no source), when the peak is above 145 (common practice, no source).
"""

from __future__ import annotations

import re

import pytest

from service.domain.findings import Priority, Rule
from service.domain.rules import evaluate
from service.domain.values import Specimen
from service.policy import load_policy
from tests.domain.test_support import at, k, na, timeline

POLICY = load_policy()


def findings(*results):  # type: ignore[no-untyped-def]
    return {f.rule: f for f in evaluate(timeline(list(results)), POLICY, at(100))}


# ---- rise -------------------------------------------------------------------------------------


def test_sodium_rise_of_11_in_20h_from_nadir_112_is_flagged() -> None:
    # >10 in 24 h (Spasovski 2014, from memory) — the design doc's example rise
    nadir, now = na(112, 0), na(123, 20)
    rise = findings(nadir, now)[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.numbers["rise"] == 11
    assert rise.numbers["hours"] == 20
    assert rise.numbers["nadir"] == 112
    assert rise.numbers["limit"] == 10
    assert rise.priority is Priority.HIGH
    assert rise.evidence == tuple(sorted([nadir.reference, now.reference]))
    assert rise.onset == at(20)


def test_rise_sentence_names_rise_span_values_and_limit() -> None:
    rise = findings(na(116, 0), na(128, 16))[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.sentence == "Sodium rose 12 mmol/L in 16 h, from 116 to 128; limit 10 mmol/L in any 24 h."


@pytest.mark.parametrize(("end", "flagged"), [(120.0, False), (120.1, True), (119.9, False)])
def test_rise_limit_of_10_is_exclusive(end: float, flagged: bool) -> None:
    # "above 10" (common practice, no source): exactly 10 is not flagged
    assert (Rule.SODIUM_RISE_TOO_FAST in findings(na(110, 0), na(end, 23))) is flagged


def test_rise_window_includes_a_nadir_exactly_24h_back() -> None:
    assert Rule.SODIUM_RISE_TOO_FAST in findings(na(110, 0), na(121, 24))


def test_rise_from_a_nadir_just_over_24h_back_is_judged_on_48h_limit_only() -> None:
    # 11 in 24.1 h: outside the 24 h window, under the 18 in 48 h limit
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(na(110, 0), na(121, 24.1))


@pytest.mark.parametrize(("nadir", "flagged"), [(129.9, True), (130.0, False)])
def test_rise_limit_applies_only_while_the_nadir_is_below_130(nadir: float, flagged: bool) -> None:
    # Spasovski 2014 "until 130" (from memory): strict below 130
    assert (Rule.SODIUM_RISE_TOO_FAST in findings(na(nadir, 0), na(nadir + 11, 20))) is flagged


def test_rise_is_measured_from_the_lowest_sodium_not_the_first() -> None:
    rise = findings(na(118, 0), na(113, 4), na(124, 20))[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.numbers["nadir"] == 113
    assert rise.numbers["hours"] == 16


@pytest.mark.parametrize(("end", "flagged"), [(113.0, False), (113.1, True)])
def test_high_risk_nadir_of_105_lowers_the_24h_limit_to_8(end: float, flagged: bool) -> None:
    # Verbalis 2013 (from memory): Na <=105 is high risk; 8 mmol/L in any 24 h, "above 8" flagged
    result = findings(na(105, 0), na(end - 3, 12), na(end, 20))
    assert (Rule.SODIUM_RISE_TOO_FAST in result) is flagged
    if flagged:
        assert result[Rule.SODIUM_RISE_TOO_FAST].numbers["limit"] == 8
        assert result[Rule.SODIUM_RISE_TOO_FAST].numbers["high_risk"] == 1


def test_nadir_of_105_1_is_normal_risk() -> None:
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(na(105.1, 0), na(114.1, 20))


def test_low_potassium_in_the_window_lowers_the_24h_limit_to_8() -> None:
    # Verbalis 2013 (from memory): hypokalaemia is a high-risk feature; below 3.5 (common practice)
    potassium = k(3.4, 2)
    rise = findings(na(115, 0), potassium, na(124, 20))[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.numbers["limit"] == 8
    assert potassium.reference in rise.evidence
    assert "high risk: potassium 3.4" in rise.sentence


def test_potassium_of_exactly_3_5_is_not_high_risk() -> None:
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(na(115, 0), k(3.5, 2), na(124, 20))


@pytest.mark.parametrize(("end", "flagged"), [(128.0, False), (128.1, True)])
def test_rise_of_more_than_18_in_48h_is_flagged(end: float, flagged: bool) -> None:
    # Verbalis 2013 as cited by Tandukar S et al, Kidney360 2021;2:1415-1423: 18 mmol/L in any 48 h, exclusive.
    # 9.8 in each day keeps every 24 h rise under 10.
    result = findings(na(110, 0), na(119.8, 24), na(end, 47))
    assert (Rule.SODIUM_RISE_TOO_FAST in result) is flagged
    if flagged:
        assert result[Rule.SODIUM_RISE_TOO_FAST].numbers["limit"] == 18
        assert "in any 48 h" in result[Rule.SODIUM_RISE_TOO_FAST].sentence


def test_rise_episode_begins_at_the_first_result_over_the_limit() -> None:
    rise = findings(na(110, 0), na(121, 12), na(123, 18))[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.onset == at(12)


def test_urine_sodium_is_no_nadir() -> None:
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(
        na(40, 0, specimen=Specimen.URINE), na(125, 4), na(126, 20)
    )


def test_censored_sodium_is_no_nadir() -> None:
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(na(100, 0, comparator="<"), na(125, 20))


# ---- projected rise ----------------------------------------------------------------------------


def test_six_in_the_first_six_hours_is_projected_past_the_24h_limit() -> None:
    # rule of sixes (Sterns RH et al, Am J Kidney Dis 2010;56:774-779, from memory): 6 in 6 h is
    # 1 mmol/L/h, a pace that gives a rise of 24 in 24 h
    projected = findings(na(112, 0), na(115, 3), na(118, 6))[Rule.SODIUM_RISE_PROJECTED]
    assert projected.numbers["rate_per_hour"] == pytest.approx(1.0)
    assert projected.numbers["projected_rise_24h"] == pytest.approx(24.0)
    assert projected.priority is Priority.MEDIUM
    assert "at this pace sodium would rise 24 mmol/L in 24 h" in projected.sentence


def test_a_projection_is_never_worded_as_a_sodium_level() -> None:
    projected = findings(na(112, 0), na(115, 3), na(118, 6))[Rule.SODIUM_RISE_PROJECTED]
    assert "reach" not in projected.sentence
    # No number after "sodium" but the measured ones: a projected 24 must never read as "sodium 24".
    for number in re.findall(r"[Ss]odium (?:of )?([0-9.]+)", projected.sentence):
        assert float(number) in (112.0, 115.0, 118.0)
    assert "from a nadir of 112 mmol/L" in projected.sentence  # the nadir carries its unit


def test_one_result_after_the_nadir_is_no_trend_to_project() -> None:
    # common practice, no source: at least two results after the nadir
    assert Rule.SODIUM_RISE_PROJECTED not in findings(na(112, 0), na(118, 6))


@pytest.mark.parametrize(("rise", "projected"), [(4.0, False), (4.1, True)])
def test_a_projection_needs_a_rise_beyond_the_reference_change_value(rise: float, projected: bool) -> None:
    # RCV95 = 1.96 x sqrt(2) x sqrt(1.0^2 + 0.6^2) % = 3.2 % of 130 = 4.2 mmol/L (Fraser & Harris 1989,
    # CVs from memory), policy rounds to 4: a rise of 4 within 4 h is within noise, 4.1 is not
    results = (na(112, 0), na(112 + rise / 2, 2), na(112 + rise, 4))
    assert (Rule.SODIUM_RISE_PROJECTED in findings(*results)) is projected


@pytest.mark.parametrize(("span", "projected"), [(3.9, False), (4.0, True)])
def test_projection_needs_at_least_4_hours_since_the_nadir(span: float, projected: bool) -> None:
    # common practice, no source: minimum span of 4 h, inclusive
    results = (na(112, 0), na(114, span / 2), na(116.5, span))
    assert (Rule.SODIUM_RISE_PROJECTED in findings(*results)) is projected


@pytest.mark.parametrize(("span", "projected"), [(12.0, False), (11.9, True)])
def test_projection_must_exceed_the_limit_strictly(span: float, projected: bool) -> None:
    # 5 in 12 h -> exactly 10 in 24 h: not above the limit of 10 (Spasovski 2014, from memory)
    results = (na(112, 0), na(114, span / 2), na(117, span))
    assert (Rule.SODIUM_RISE_PROJECTED in findings(*results)) is projected


def test_projection_gives_way_once_the_limit_is_crossed() -> None:
    result = findings(na(112, 0), na(118, 6), na(123, 12))
    assert Rule.SODIUM_RISE_TOO_FAST in result
    assert Rule.SODIUM_RISE_PROJECTED not in result


# ---- fall ---------------------------------------------------------------------------------------


def test_sodium_fall_of_12_in_18h_from_162_is_flagged() -> None:
    # Adrogué & Madias 2000 (from memory): <=10 mmol/L per 24 h
    fall = findings(na(162, 0), na(150, 18))[Rule.SODIUM_FALL_TOO_FAST]
    assert fall.numbers["fall"] == 12
    assert fall.sentence == "Sodium fell 12 mmol/L in 18 h, from 162 to 150; limit 10 mmol/L in any 24 h."


@pytest.mark.parametrize(("end", "flagged"), [(150.0, False), (149.9, True)])
def test_fall_limit_of_10_in_24h_is_exclusive(end: float, flagged: bool) -> None:
    # Over 24 h the hourly rate stays at or under 0.5 (10/24 = 0.42), so only the total decides.
    assert (Rule.SODIUM_FALL_TOO_FAST in findings(na(160, 0), na(end, 24))) is flagged


@pytest.mark.parametrize(("fall", "flagged"), [(2.0, False), (2.1, True)])
def test_fall_faster_than_half_a_mmol_per_hour_over_4h_is_flagged(fall: float, flagged: bool) -> None:
    # Adrogué & Madias 2000 (from memory): 0.5 mmol/L/h; exactly 0.5/h is not flagged
    result = findings(na(158, 0), na(158 - fall, 4))
    assert (Rule.SODIUM_FALL_TOO_FAST in result) is flagged
    if flagged:
        assert result[Rule.SODIUM_FALL_TOO_FAST].numbers["rate_per_hour"] == pytest.approx(fall / 4)


def test_fast_fall_over_less_than_4h_is_not_yet_sustained() -> None:
    assert Rule.SODIUM_FALL_TOO_FAST not in findings(na(158, 0), na(155, 3.9))


@pytest.mark.parametrize(("peak", "flagged"), [(145.0, False), (145.1, True)])
def test_fall_applies_only_when_the_peak_is_above_145(peak: float, flagged: bool) -> None:
    assert (Rule.SODIUM_FALL_TOO_FAST in findings(na(peak, 0), na(peak - 3, 4))) is flagged
