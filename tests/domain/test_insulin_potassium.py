"""Hypokalaemia persisting during insulin therapy.

Threshold below 3.5 mmol/L (Umpierrez 2024, from memory; clinical-reference §6), alternative 3.3
(Kitabchi 2009 via clinical-reference §6), escalation below 3.0 and persistence as two consecutive
lows at least 1 h apart (clinical-reference §6 engine rule: common practice, no source), recheck
every 2 h (UK JBDS DKA, from memory), IV tail 60 min (common practice, no source).
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


def test_two_consecutive_low_potassium_results_during_iv_insulin_are_flagged() -> None:
    drip = insulin(0)
    first, second = k(3.3, 1), k(3.2, 2)
    finding = hypo([first, second], [drip], 2.1)
    assert finding is not None
    assert finding.priority is Priority.MEDIUM
    assert set(finding.evidence) == {first.reference, second.reference, drip.reference}
    assert finding.onset == at(1)
    assert finding.numbers["consecutive_low"] == 2


def test_one_low_potassium_within_the_recheck_interval_is_not_yet_flagged() -> None:
    assert hypo([k(3.3, 1)], [insulin(0)], 2.9) is None


@pytest.mark.parametrize(("now_h", "flagged"), [(3.0, False), (3.01, True)])
def test_no_newer_potassium_for_more_than_2h_is_flagged_by_time_alone(now_h: float, flagged: bool) -> None:
    # recheck 2 h (UK JBDS DKA, from memory); exactly 2 h is not yet overdue
    finding = hypo([k(3.3, 1)], [insulin(0)], now_h)
    assert (finding is not None) is flagged
    if finding is not None:
        assert "no newer potassium within the 2 h recheck interval" in finding.sentence


@pytest.mark.parametrize(("value", "flagged"), [(3.5, False), (3.49, True)])
def test_threshold_3_5_is_exclusive(value: float, flagged: bool) -> None:
    assert (hypo([k(value, 1)], [insulin(0)], 4) is not None) is flagged


def test_potassium_below_3_raises_the_priority() -> None:
    finding = hypo([k(2.9, 1)], [insulin(0)], 4)
    assert finding is not None and finding.priority is Priority.HIGH


def test_potassium_of_exactly_3_keeps_medium_priority() -> None:
    finding = hypo([k(3.0, 1)], [insulin(0)], 4)
    assert finding is not None and finding.priority is Priority.MEDIUM


def test_a_newer_potassium_at_threshold_resolves_it() -> None:
    assert hypo([k(3.2, 1), k(3.1, 2), k(3.5, 3)], [insulin(0)], 6) is None


def test_it_resolves_once_the_infusion_and_its_tail_have_ended() -> None:
    results = [k(3.2, 1), k(3.1, 2)]
    assert hypo(results, [insulin(0, end_h=2)], 3.0) is not None  # end + 60 min, inclusive
    assert hypo(results, [insulin(0, end_h=2)], 3.01) is None


def test_subcutaneous_insulin_does_not_count_by_default() -> None:
    assert hypo([k(3.2, 1), k(3.1, 2)], [insulin(0, route="subcutaneous")], 2.5) is None


def test_a_site_can_count_subcutaneous_insulin() -> None:
    p = policy(insulin_potassium={"routes": ("intravenous", "subcutaneous")})
    assert hypo([k(3.2, 1), k(3.1, 2)], [insulin(0, route="subcutaneous")], 2.5, p=p) is not None


def test_an_administration_not_done_does_not_count() -> None:
    assert hypo([k(3.2, 1), k(3.1, 2)], [insulin(0, status="not-done")], 2.5) is None


def test_two_lows_less_than_an_hour_apart_are_not_yet_persistent() -> None:
    # common practice, no source: >=1 h apart, inclusive
    assert hypo([k(3.2, 1), k(3.1, 1.9)], [insulin(0)], 2.0) is None
    assert hypo([k(3.2, 1), k(3.1, 2.0)], [insulin(0)], 2.0) is not None


def test_low_potassium_before_insulin_started_and_not_rechecked_is_flagged() -> None:
    finding = hypo([k(3.2, 0)], [insulin(1)], 2.5)
    assert finding is not None
    assert finding.onset == at(0)


def test_overdue_then_persistent_stays_one_episode() -> None:
    drip = insulin(0)
    overdue = hypo([k(3.2, 1)], [drip], 3.5)
    persistent = hypo([k(3.2, 1), k(3.1, 4)], [drip], 4.1)
    assert overdue is not None and persistent is not None
    assert overdue.episode == persistent.episode


def test_a_later_now_does_not_change_an_overdue_finding() -> None:
    # The sentence and numbers avoid the wall clock, so the flag is not rewritten every tick.
    drip, low = insulin(0), k(3.2, 1)
    early, late = hypo([low], [drip], 3.5), hypo([low], [drip], 9.0)
    assert early is not None
    assert early == late


def test_alternative_threshold_of_3_3_from_policy() -> None:
    # Kitabchi 2009 via clinical-reference §6: K <3.3
    p = policy(insulin_potassium={"below": 3.3})
    assert hypo([k(3.4, 1)], [insulin(0)], 4, p=p) is None
    assert hypo([k(3.2, 1)], [insulin(0)], 4, p=p) is not None
