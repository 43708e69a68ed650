"""Low potassium while insulin is being given: raised at once, high when guidelines say hold.

Check values and their sources:
- hold below 3.3 mmol/L: Kitabchi AE et al, Diabetes Care 2009;32:1335-1343 ("K+ <3.3: hold
  insulin", as tabulated in Cleve Clin J Med 2025;92(3):152, Table 4);
- low below 3.5 mmol/L: Umpierrez GE et al, Diabetes Care 2024;47:1257-1275 (from memory);
- high below 3.0, two consecutive lows at least 1 h apart: common practice, no source;
- recheck every 2 h: UK JBDS DKA guideline (from memory); IV tail 60 min: common practice, no source;
- subcutaneous rapid-acting analogue every 1-2 h in mild/moderate DKA: Umpierrez 2024 (seen in a
  summary of the report).
"""

from __future__ import annotations

import pytest

from service.domain.findings import Priority, Rule
from service.domain.rules import evaluate
from service.policy import load_policy
from tests.domain.test_support import at, insulin, k, policy, timeline

POLICY = load_policy()


def hypo(results, exposures, now_h: float, p=POLICY):  # type: ignore[no-untyped-def]
    found = [f for f in evaluate(timeline(results, exposures), p, at(now_h)) if f.rule is Rule.HYPOKALEMIA_ON_INSULIN]
    return found[0] if found else None


def test_one_low_potassium_during_iv_insulin_is_raised_at_once_at_medium_priority() -> None:
    drip, low = insulin(0), k(3.4, 1)
    finding = hypo([low], [drip], 1.01)
    assert finding is not None
    assert finding.priority is Priority.MEDIUM
    assert set(finding.evidence) == {low.reference, drip.reference}
    assert finding.onset == at(1)


@pytest.mark.parametrize(("value", "flagged"), [(3.5, False), (3.49, True)])
def test_the_low_threshold_3_5_is_exclusive(value: float, flagged: bool) -> None:
    assert (hypo([k(value, 1)], [insulin(0)], 1.5) is not None) is flagged


@pytest.mark.parametrize(("value", "priority"), [(3.3, Priority.MEDIUM), (3.29, Priority.HIGH)])
def test_below_the_hold_threshold_3_3_is_high_priority_at_once(value: float, priority: Priority) -> None:
    finding = hypo([k(value, 1)], [insulin(0)], 1.01)
    assert finding is not None and finding.priority is priority


def test_below_the_hold_threshold_the_sentence_says_what_guidelines_advise() -> None:
    finding = hypo([k(3.1, 1)], [insulin(0)], 1.01)
    assert finding is not None
    assert "guidelines advise holding insulin until potassium is at least 3.3 mmol/L" in finding.sentence
    assert finding.numbers["below_hold"] == 1.0


def test_insulin_started_after_a_potassium_below_the_hold_threshold_is_raised_when_it_starts() -> None:
    low, drip = k(3.1, 0), insulin(0.5)
    assert hypo([low], [drip], 0.4) is None  # no insulin yet: nothing to say
    finding = hypo([low], [drip], 0.5)
    assert finding is not None and finding.priority is Priority.HIGH
    assert "insulin started 30 min after this result" in finding.sentence
    assert set(finding.evidence) == {low.reference, drip.reference}


def test_two_consecutive_lows_an_hour_apart_raise_the_priority() -> None:
    # common practice, no source: >= 1 h apart, inclusive
    drip = insulin(0)
    assert hypo([k(3.4, 1), k(3.4, 1.9)], [drip], 2.0).priority is Priority.MEDIUM  # type: ignore[union-attr]
    finding = hypo([k(3.4, 1), k(3.4, 2.0)], [drip], 2.0)
    assert finding is not None and finding.priority is Priority.HIGH
    assert finding.numbers["consecutive_low"] == 2
    assert "2 consecutive results below 3.5 over 1 h" in finding.sentence


@pytest.mark.parametrize(("now_h", "priority"), [(3.0, Priority.MEDIUM), (3.01, Priority.HIGH)])
def test_no_newer_potassium_for_more_than_2h_raises_the_priority_by_time_alone(
    now_h: float, priority: Priority
) -> None:
    # recheck 2 h (UK JBDS DKA, from memory); exactly 2 h is not yet overdue
    finding = hypo([k(3.4, 1)], [insulin(0)], now_h)
    assert finding is not None and finding.priority is priority
    if priority is Priority.HIGH:
        assert "no newer potassium within the 2 h recheck interval" in finding.sentence


def test_potassium_below_3_is_high_even_when_the_hold_threshold_is_set_lower() -> None:
    p = policy(insulin_potassium={"hold_below": 2.8})
    finding = hypo([k(2.9, 1)], [insulin(0)], 1.01, p=p)
    assert finding is not None and finding.priority is Priority.HIGH
    assert "a result below 3 mmol/L" in finding.sentence


def test_a_newer_potassium_at_threshold_resolves_it() -> None:
    assert hypo([k(3.2, 1), k(3.1, 2), k(3.5, 3)], [insulin(0)], 3.1) is None


def test_it_resolves_once_the_infusion_and_its_tail_have_ended() -> None:
    results = [k(3.2, 1), k(3.1, 2)]
    assert hypo(results, [insulin(0, end_h=2)], 3.0) is not None  # end + 60 min, inclusive
    assert hypo(results, [insulin(0, end_h=2)], 3.01) is None


def test_a_low_and_a_normal_potassium_at_the_same_instant_count_as_low() -> None:
    # The same specimen run twice, or a gas and a lab sample stamped alike: whichever arrived first,
    # the moment is judged low (invariant: same data, same Flags).
    for ids in (("a", "b"), ("b", "a")):
        low, normal = k(3.2, 1, obs_id=ids[0]), k(4.0, 1, obs_id=ids[1])
        finding = hypo([low, normal], [insulin(0)], 1.01)
        assert finding is not None and finding.numbers["potassium"] == 3.2


def test_subcutaneous_insulin_does_not_count_by_default() -> None:
    assert hypo([k(3.2, 1), k(3.1, 2)], [insulin(0, route="subcutaneous")], 2.5) is None


def test_the_subcutaneous_dka_profile_counts_a_rapid_acting_dose_for_2_hours() -> None:
    p = load_policy(profile="dka-subcutaneous")
    dose = insulin(1, end_h=1, route="subcutaneous", status="completed")  # A10AB01, fast-acting
    assert hypo([k(3.4, 0.5)], [dose], 3.0, p=p) is not None  # 2 h after the dose, inclusive
    assert hypo([k(3.4, 0.5)], [dose], 3.01, p=p) is None


def test_an_administration_not_done_does_not_count() -> None:
    assert hypo([k(3.2, 1), k(3.1, 2)], [insulin(0, status="not-done")], 2.5) is None


def test_overdue_then_persistent_stays_one_episode() -> None:
    drip = insulin(0)
    overdue = hypo([k(3.2, 1)], [drip], 3.5)
    persistent = hypo([k(3.2, 1), k(3.1, 4)], [drip], 4.1)
    assert overdue is not None and persistent is not None
    assert overdue.episode == persistent.episode


def test_a_later_now_does_not_change_an_overdue_finding() -> None:
    # The sentence and numbers avoid the wall clock, so the flag is not rewritten every tick.
    drip, low = insulin(0), k(3.4, 1)
    early, late = hypo([low], [drip], 3.5), hypo([low], [drip], 9.0)
    assert early is not None
    assert early == late


def test_the_2024_hold_threshold_of_3_5_is_a_policy_choice() -> None:
    # Umpierrez 2024 (from memory): hold insulin below 3.5
    p = policy(insulin_potassium={"hold_below": 3.5})
    finding = hypo([k(3.4, 1)], [insulin(0)], 1.01, p=p)
    assert finding is not None and finding.priority is Priority.HIGH
    assert "at least 3.5 mmol/L" in finding.sentence
