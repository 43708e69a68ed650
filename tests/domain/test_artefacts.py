"""Possible specimen artefacts are named on the Flags they touch and kept out of rate rules.

Sources: delta checks after CLSI EP33 (Use of Delta Checks in the Medical Laboratory, 2nd ed.,
2023); change sizes (sodium 8, glucose 10, potassium 1.5 mmol/L within 6 h) common practice, no
source; 0.9% NaCl is 9 g/L / 58.44 g/mol = 154 mmol/L sodium and 5% glucose 50 g/L / 180.156 g/mol
= 277.5 mmol/L (arithmetic). K2EDTA contamination shows as hyperkalaemia with hypocalcaemia (Cornes
MP, Ford C, Gama R, Ann Clin Biochem 2008;45:601-603; K >= 6.0 screened there); calcium cut-off
1.5 mmol/L common practice, no source. Critical limits: RCPath G158 2017 (K >= 6.5, Na <= 120).
"""

from __future__ import annotations

from dataclasses import replace

import pytest

from service.domain.artefacts import suspects
from service.domain.findings import Rule
from service.domain.rules import evaluate
from service.domain.values import Analyte
from service.policy import load_policy
from tests.domain.test_support import at, glu, insulin, k, lab, na, timeline

POLICY = load_policy()


def findings(*results, now_h: float = 100, exposures=()):  # type: ignore[no-untyped-def]
    return {f.rule: f for f in evaluate(timeline(list(results), list(exposures)), POLICY, at(now_h))}


def ca(value: float, h: float):  # type: ignore[no-untyped-def]
    return replace(lab(Analyte.POTASSIUM, value, h), analyte=Analyte.CALCIUM, loinc="2000-8")


def test_a_drip_arm_sodium_that_reverts_at_the_next_draw_raises_no_rate_alarm() -> None:
    # 124, then 136 drawn 4 h later (+12 toward saline's 154), then 125: one bad sample
    before, spike, after = na(124, 0), na(136, 4), na(125, 8)
    assert Rule.SODIUM_RISE_TOO_FAST not in findings(before, spike)  # unconfirmed: not used yet
    result = findings(before, spike, after)
    assert Rule.SODIUM_RISE_TOO_FAST not in result
    assert Rule.SODIUM_FALL_TOO_FAST not in result
    assert "reverted at the next draw" in suspects([before, spike, after], POLICY)[spike.reference]


def test_a_jump_that_a_later_result_confirms_is_used_by_the_rate_rules() -> None:
    # 124 -> 136 -> 135: the later result agrees (within 8), so the rise of 11 is the patient's
    rise = findings(na(124, 0), na(136, 4), na(135, 8))[Rule.SODIUM_RISE_TOO_FAST]
    assert rise.numbers["rise"] == 11
    assert "artefact" not in rise.sentence


@pytest.mark.parametrize(("jump", "suspect"), [(8.0, False), (8.1, True)])
def test_the_sodium_delta_check_is_8_exclusive(jump: float, suspect: bool) -> None:
    spike = na(124 + jump, 4)
    assert (spike.reference in suspects([na(124, 0), spike], POLICY)) is suspect


def test_a_jump_away_from_the_infusion_composition_is_not_a_drip_arm_sample() -> None:
    # 150 -> 140: toward nothing a saline drip would give (154 is above both)
    spike = na(140, 4)
    assert spike.reference not in suspects([na(150, 0), spike], POLICY)


def test_a_jump_over_more_than_6_hours_is_not_checked() -> None:
    spike = na(136, 6.1)
    assert spike.reference not in suspects([na(124, 0), spike], POLICY)


def test_a_dextrose_contaminated_glucose_raises_no_crisis_fall() -> None:
    # Glucose 20, then 45 (+25 toward 5% glucose), then 19 in an infusion: no "fall" from 45
    result = findings(glu(20, 0), glu(45, 2), glu(19, 4), exposures=(insulin(-1),))
    assert Rule.GLUCOSE_FALL_TOO_FAST not in result


def test_high_potassium_with_very_low_calcium_is_annotated_as_possible_edta_contamination() -> None:
    potassium, calcium = k(7.2, 1), ca(0.9, 1)
    high = findings(potassium, calcium)[Rule.POTASSIUM_CRITICAL_HIGH]  # never suppressed
    assert "Possible specimen artefact: potassium 7.2 with calcium 0.9 mmol/L" in high.sentence
    assert "K2EDTA" in high.sentence and high.sentence.endswith("repeat the sample.")
    assert high.numbers["suspect_results"] == 1


@pytest.mark.parametrize(
    ("potassium", "calcium", "suspect"),
    [(6.0, 1.5, True), (5.99, 1.5, False), (6.0, 1.51, False)],
)
def test_the_edta_pattern_limits_are_inclusive(potassium: float, calcium: float, suspect: bool) -> None:
    result = k(potassium, 1)
    assert (result.reference in suspects([result, ca(calcium, 1)], POLICY)) is suspect


def test_a_sample_marked_haemolysed_is_annotated_and_still_flagged() -> None:
    high = replace(k(6.9, 1), quality="haemolysed (specimen condition HEM)")
    flag = findings(high)[Rule.POTASSIUM_CRITICAL_HIGH]
    assert "Possible specimen artefact: sample haemolysed (specimen condition HEM); repeat the sample." in flag.sentence


def test_a_critical_sodium_on_a_suspect_sample_is_raised_and_annotated() -> None:
    # 128 -> 160.5 within 2 h: +32.5, ending nearer saline's 154 than it began, not yet confirmed.
    # It is suspect, yet at or above the critical 160 (RCPath G158 2017), so it is raised.
    spike = na(160.5, 2)
    high = findings(na(128, 0), spike)[Rule.SODIUM_CRITICAL_HIGH]
    assert "Possible specimen artefact: sodium moved +32.5 mmol/L from the previous result" in high.sentence
    assert "not yet confirmed by a later result" in high.sentence
