"""Dangerous levels. Default limits: RCPath G158 2017 and Kost 1990
(Na <=120 / >=160, K <=2.5 / >=6.5, glucose <=2.5 / >=25 mmol/L); osmolality <=250 (Kost table)
/ >=330 (Thomas 2003 eJIFCC). Both limits inclusive, as the reference writes them."""

from __future__ import annotations

from dataclasses import replace

import pytest

from service.domain.findings import Priority, Rule
from service.domain.rules import evaluate
from service.domain.values import Analyte, Specimen
from service.policy import load_policy
from tests.domain.test_support import (
    MG_DL_PER_MMOL_L,
    at,
    glu,
    k,
    na,
    osm,
    policy,
    timeline,
)

POLICY = load_policy()


def rules_for(*results, p=POLICY) -> set[Rule]:  # type: ignore[no-untyped-def]
    return {f.rule for f in evaluate(timeline(list(results)), p, at(100))}


@pytest.mark.parametrize(
    ("make", "value", "rule", "flagged"),
    [
        # RCPath G158 2017: sodium <=120 is critical
        (na, 120.0, Rule.SODIUM_CRITICAL_LOW, True),
        (na, 119.9, Rule.SODIUM_CRITICAL_LOW, True),
        (na, 120.1, Rule.SODIUM_CRITICAL_LOW, False),
        # RCPath G158 2017: sodium >=160 is critical
        (na, 160.0, Rule.SODIUM_CRITICAL_HIGH, True),
        (na, 160.1, Rule.SODIUM_CRITICAL_HIGH, True),
        (na, 159.9, Rule.SODIUM_CRITICAL_HIGH, False),
        # RCPath G158 2017: potassium <=2.5 / >=6.5
        (k, 2.5, Rule.POTASSIUM_CRITICAL_LOW, True),
        (k, 2.4, Rule.POTASSIUM_CRITICAL_LOW, True),
        (k, 2.6, Rule.POTASSIUM_CRITICAL_LOW, False),
        (k, 6.5, Rule.POTASSIUM_CRITICAL_HIGH, True),
        (k, 6.6, Rule.POTASSIUM_CRITICAL_HIGH, True),
        (k, 6.4, Rule.POTASSIUM_CRITICAL_HIGH, False),
        # RCPath G158 2017: glucose <=2.5 / >=25 mmol/L
        (glu, 2.5, Rule.GLUCOSE_CRITICAL_LOW, True),
        (glu, 2.4, Rule.GLUCOSE_CRITICAL_LOW, True),
        (glu, 2.6, Rule.GLUCOSE_CRITICAL_LOW, False),
        (glu, 25.0, Rule.GLUCOSE_CRITICAL_HIGH, True),
        (glu, 25.1, Rule.GLUCOSE_CRITICAL_HIGH, True),
        (glu, 24.9, Rule.GLUCOSE_CRITICAL_HIGH, False),
        # Kost critical-limits table: osmolality low 250
        (osm, 250.0, Rule.OSMOLALITY_CRITICAL_LOW, True),
        (osm, 249.0, Rule.OSMOLALITY_CRITICAL_LOW, True),
        (osm, 251.0, Rule.OSMOLALITY_CRITICAL_LOW, False),
        # Thomas 2003 eJIFCC: osmolality high 330
        (osm, 330.0, Rule.OSMOLALITY_CRITICAL_HIGH, True),
        (osm, 331.0, Rule.OSMOLALITY_CRITICAL_HIGH, True),
        (osm, 329.0, Rule.OSMOLALITY_CRITICAL_HIGH, False),
    ],
)
def test_critical_limits_are_inclusive_at_the_boundary(make, value, rule, flagged) -> None:  # type: ignore[no-untyped-def]
    assert (rule in rules_for(make(value, 0))) is flagged


def test_sodium_118_reads_as_one_plain_sentence_with_its_numbers() -> None:
    [finding] = evaluate(timeline([na(118, 0)]), POLICY, at(1))
    assert finding.sentence == "Sodium 118 mmol/L, at or below the critical limit of 120 mmol/L."
    assert dict(finding.numbers) == {"value": 118.0, "limit": 120.0}
    assert finding.priority is Priority.HIGH
    assert finding.onset == at(0)
    assert finding.encounter == "enc-1"


def test_a_newer_sodium_back_inside_the_limits_clears_the_finding() -> None:
    assert rules_for(na(118, 0), na(124, 2)) == set()


def test_a_newer_critical_sodium_keeps_the_episode_that_began_with_the_first() -> None:
    first, second = na(118, 0), na(117, 2)
    [finding] = evaluate(timeline([first, second]), POLICY, at(3))
    assert finding.onset == at(0)
    assert finding.evidence == (second.reference,)
    assert finding.numbers["value"] == 117.0


def test_a_critical_sodium_after_a_safe_one_starts_a_new_episode() -> None:
    [finding] = evaluate(timeline([na(118, 0), na(125, 2), na(119, 4)]), POLICY, at(5))
    assert finding.onset == at(4)


def test_urine_sodium_never_raises_a_level_finding() -> None:
    assert rules_for(na(20, 0, specimen=Specimen.URINE)) == set()


def test_urine_result_does_not_clear_a_serum_finding() -> None:
    assert rules_for(na(118, 0), na(140, 1, specimen=Specimen.URINE)) == {Rule.SODIUM_CRITICAL_LOW}


def test_censored_glucose_above_600_mg_dl_proves_high() -> None:
    # ">600 mg/dL" (33.3 mmol/L) proves >=25 mmol/L (brief; RCPath limit)
    bound = 600 / MG_DL_PER_MMOL_L
    [finding] = evaluate(timeline([glu(bound, 0, comparator=">")]), POLICY, at(1))
    assert finding.rule is Rule.GLUCOSE_CRITICAL_HIGH
    assert finding.sentence.startswith("Glucose >33.3 mmol/L")


def test_censored_glucose_below_20_mg_dl_proves_low() -> None:
    bound = 20 / MG_DL_PER_MMOL_L  # 1.1 mmol/L
    assert rules_for(glu(bound, 0, comparator="<")) == {Rule.GLUCOSE_CRITICAL_LOW}


def test_censored_value_whose_bound_proves_nothing_raises_nothing() -> None:
    # ">20 mmol/L" could be 21: it does not prove >=25
    assert rules_for(glu(20.0, 0, comparator=">")) == set()


def test_censored_value_that_proves_nothing_does_not_clear_an_earlier_finding() -> None:
    assert rules_for(glu(30.0, 0), glu(20.0, 1, comparator=">")) == {Rule.GLUCOSE_CRITICAL_HIGH}


def test_censored_value_whose_bound_is_inside_the_limits_clears() -> None:
    # "<20 mmol/L" proves below 25, so it clears a high glucose
    assert rules_for(glu(30.0, 0), glu(20.0, 1, comparator="<")) == set()


def test_point_of_care_glucose_asks_for_a_laboratory_sample() -> None:
    [finding] = evaluate(timeline([glu(1.9, 0, specimen=Specimen.POINT_OF_CARE)]), POLICY, at(1))
    assert finding.rule is Rule.GLUCOSE_CRITICAL_LOW
    assert finding.sentence.endswith("confirm with a laboratory sample.")
    assert "point-of-care" in finding.sentence


def test_laboratory_glucose_does_not_ask_for_confirmation() -> None:
    [finding] = evaluate(timeline([glu(1.9, 0)]), POLICY, at(1))
    assert "confirm" not in finding.sentence


def test_point_of_care_sodium_is_not_judged_by_default() -> None:
    # The default policy lists serum-plasma and whole-blood for sodium levels only.
    assert rules_for(na(110, 0, specimen=Specimen.POINT_OF_CARE)) == set()


def test_calculated_osmolality_result_is_not_a_measured_level() -> None:
    assert rules_for(osm(340, 0, calculated=True)) == set()


def test_low_sodium_with_high_glucose_shows_corrected_sodium() -> None:
    # Katz 1973, worked by hand (example 4): Na 130 with glucose 33.3 -> 137.9987;
    # here Na 118 with glucose 33.3 -> 118 + 7.9987 = 125.9987
    sodium, glucose = na(118, 0), glu(33.3, 0.1)
    findings = evaluate(timeline([sodium, glucose]), POLICY, at(1))
    [low] = [f for f in findings if f.rule is Rule.SODIUM_CRITICAL_LOW]
    assert low.numbers["corrected_sodium"] == pytest.approx(125.9987, abs=1e-3)
    assert "glucose-corrected sodium 126 mmol/L" in low.sentence
    assert glucose.reference in low.evidence


def test_low_sodium_with_normal_glucose_shows_no_correction() -> None:
    [low] = evaluate(timeline([na(118, 0), glu(6.0, 0.1)]), POLICY, at(1))
    assert "corrected" not in low.sentence
    assert "corrected_sodium" not in low.numbers


def test_a_site_limit_changes_the_verdict() -> None:
    stricter = POLICY.model_copy(
        update={
            "levels": tuple(
                lim.model_copy(update={"low": 125.0}) if lim.analyte == "sodium" else lim
                for lim in POLICY.levels
            )
        }
    )
    assert rules_for(na(124, 0), p=stricter) == {Rule.SODIUM_CRITICAL_LOW}
    assert rules_for(na(124, 0)) == set()


def test_policy_helper_can_override_a_section() -> None:
    # Guards the test builder itself: an override must reach the rules.
    p = policy(derived={"corrected_sodium_from_glucose": 40.0})
    findings = evaluate(timeline([na(118, 0), glu(33.3, 0)]), p, at(1))
    [low] = [f for f in findings if f.rule is Rule.SODIUM_CRITICAL_LOW]
    assert "corrected" not in low.sentence


def test_calcium_is_context_only_and_never_raises_a_flag() -> None:
    # Calcium feeds the K2EDTA check (Cornes MP et al, Ann Clin Biochem 2008;45:601-603), nothing else.
    calcium = replace(na(0.5, 0), analyte=Analyte.CALCIUM, loinc="2000-8")
    assert evaluate(timeline([calcium]), load_policy(), at(1)) == []
