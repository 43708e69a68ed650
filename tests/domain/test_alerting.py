"""Which Flag versions page the responder topic: raised, a priority rise, a worsening of the rule's
measure by a policy step since the last page, closed, withdrawn. Everything else is for the record.

Worsening steps are the default policy's (sodium 2, potassium 0.3, glucose 2 mmol/L; osmolality
5 mOsm/kg; rates glucose 2 mmol/L/h, osmolality 2 mOsm/kg/h): common practice, no source.
Sodium 118 mmol/L is at or below the critical low of 120 (RCPath G158 2017); potassium below 3.5
mmol/L during IV insulin is hypokalaemia on insulin, below 3.0 high priority (Umpierrez 2024, from
memory; 3.0 common practice, no source).
"""

from __future__ import annotations

import pytest

from service.domain.alerting import MEASURES, Measure, Paged, Reason, Worse, measure_of, page_reason
from service.domain.findings import Finding, Priority, Rule
from service.domain.rules import evaluate
from service.domain.values import Analyte
from service.policy import load_policy
from tests.domain.test_support import glu, insulin, k, na, osm, timeline

POLICY = load_policy()
STEPS = POLICY.alerting
HIGH, MEDIUM = Priority.HIGH, Priority.MEDIUM


def sodium_low(value: float, priority: Priority = HIGH) -> dict[str, object]:
    return {"rule": Rule.SODIUM_CRITICAL_LOW, "priority": priority, "numbers": {"value": value, "limit": 120.0}}


def reason(change: str, last: Paged, **finding: object) -> Reason | None:
    return page_reason(change=change, last=last, steps=STEPS, **finding)  # type: ignore[arg-type]


# ---- the mapping ----------------------------------------------------------------------------------


def test_every_rule_has_an_explicit_measure() -> None:
    missing = sorted(set(Rule) - set(MEASURES))
    assert missing == [], f"add a Measure for {missing} in service/domain/alerting.py"


def findings_by_rule() -> dict[Rule, Finding]:
    """One invented timeline per rule (values chosen to cross each default limit)."""
    scenarios = [
        ([na(118, 0)], []), ([na(162, 0)], []),  # RCPath G158 2017: Na <=120 / >=160
        ([k(2.4, 0)], []), ([k(6.9, 0)], []),  # RCPath G158 2017: K <=2.5 / >=6.5
        ([glu(2.2, 0)], []), ([glu(30, 0)], []),  # RCPath G158 2017: glucose <=2.5 / >=25
        ([osm(240, 0)], []), ([osm(340, 0)], []),  # Kost table <=250; Thomas 2003 >330
        ([na(112, 0), na(123, 20)], []),  # rise 11 in 20 h > 10 (Spasovski 2014, from memory)
        ([na(115, 0), na(118, 3), na(121, 6)], []),  # 1 mmol/L/h over 6 h projects past 10 in 24 h (common practice)
        ([na(158, 0), na(147, 20)], []),  # fall 11 in 20 h > 10 (Adrogue & Madias 2000, from memory)
        ([osm(360, 0), osm(340, 2), glu(40, 0)], []),  # 10 mOsm/kg/h > 8 (JBDS 2023, Mustafa)
        ([glu(40, 0), glu(28, 2)], [insulin(-1)]),  # 6 mmol/L/h > 5 (JBDS 2023, Mustafa), during IV insulin
        # corrected sodium 139.9 (Na 130, glucose 40; 2 Na + glucose = 300, a crisis: Umpierrez 2024) -> 128:
        # a fall of 11.9 > 10 in 24 h (JBDS HHS, Mustafa 2023, from memory)
        ([na(130, 0), glu(40, 0), na(128, 12), glu(12, 12)], []),
        ([k(3.3, 1), k(3.2, 2)], [insulin(0)]),  # two lows below 3.5 during IV insulin (Umpierrez 2024)
    ]
    out: dict[Rule, Finding] = {}
    for results, exposures in scenarios:
        last = max(r.effective for r in results)
        for f in evaluate(timeline(results, exposures), POLICY, last):
            out.setdefault(f.rule, f)
    return out


def test_every_rule_emits_the_number_its_measure_names() -> None:
    found = findings_by_rule()
    assert set(found) == set(Rule)
    absent = {rule.value: MEASURES[rule].number for rule, f in found.items() if MEASURES[rule].number not in f.numbers}
    assert absent == {}


def test_levels_are_measured_by_the_value_further_beyond_the_limit_being_worse() -> None:
    assert MEASURES[Rule.SODIUM_CRITICAL_LOW] == Measure("value", Worse.LOWER, Analyte.SODIUM)
    assert MEASURES[Rule.GLUCOSE_CRITICAL_HIGH] == Measure("value", Worse.HIGHER, Analyte.GLUCOSE)


def test_rates_are_measured_per_hour() -> None:
    assert MEASURES[Rule.GLUCOSE_FALL_TOO_FAST] == Measure("rate_per_hour", Worse.HIGHER, Analyte.GLUCOSE,
                                                          per_hour=True)
    assert MEASURES[Rule.OSMOLALITY_FALL_TOO_FAST].per_hour


def test_hypokalaemia_on_insulin_is_measured_by_potassium_lower_being_worse() -> None:
    assert MEASURES[Rule.HYPOKALEMIA_ON_INSULIN] == Measure("potassium", Worse.LOWER, Analyte.POTASSIUM)


def test_measure_of_reads_the_mapped_number() -> None:
    assert measure_of(Rule.SODIUM_RISE_TOO_FAST, {"rise": 11.0, "sodium": 123.0}) == 11.0
    assert measure_of(Rule.SODIUM_FALL_TOO_FAST, {"fall": 11.0, "rate_per_hour": 0.6}) == 11.0


# ---- what pages -----------------------------------------------------------------------------------


@pytest.mark.parametrize("change", ["create", "reactivate"])
def test_a_raised_flag_pages(change: str) -> None:
    assert reason(change, Paged(None, None), **sodium_low(118)) is Reason.RAISED


@pytest.mark.parametrize(("change", "expected"), [("close", Reason.CLOSED), ("withdraw", Reason.WITHDRAWN)])
def test_closing_and_withdrawing_page(change: str, expected: Reason) -> None:
    assert reason(change, Paged(HIGH, 118.0), **sodium_low(118)) is expected


def test_new_evidence_at_the_same_level_does_not_page() -> None:
    assert reason("update", Paged(HIGH, 118.0), **sodium_low(118)) is None


def test_a_worsening_by_one_step_pages() -> None:
    assert reason("update", Paged(HIGH, 118.0), **sodium_low(116)) is Reason.WORSENED


def test_a_worsening_by_less_than_a_step_does_not_page() -> None:
    assert reason("update", Paged(HIGH, 118.0), **sodium_low(116.5)) is None


def test_creeping_worsening_is_measured_from_the_last_page_so_it_pages_once_it_sums_to_a_step() -> None:
    last = Paged(HIGH, 118.0)  # what was sent; 117.5, 117 and 116.5 were not
    assert [reason("update", last, **sodium_low(v)) for v in (117.5, 117.0, 116.5, 116.0)] == [
        None, None, None, Reason.WORSENED]


def test_an_improvement_does_not_page() -> None:
    assert reason("update", Paged(HIGH, 116.0), **sodium_low(119.5)) is None


def test_higher_is_worse_for_a_high_limit() -> None:
    high = {"rule": Rule.POTASSIUM_CRITICAL_HIGH, "priority": HIGH}
    assert reason("update", Paged(HIGH, 6.6), numbers={"value": 6.9}, **high) is Reason.WORSENED
    assert reason("update", Paged(HIGH, 6.9), numbers={"value": 6.6}, **high) is None


def test_lower_potassium_is_worse_on_insulin() -> None:
    hypo = {"rule": Rule.HYPOKALEMIA_ON_INSULIN, "priority": MEDIUM}
    assert reason("update", Paged(MEDIUM, 3.4), numbers={"potassium": 3.1}, **hypo) is Reason.WORSENED
    assert reason("update", Paged(MEDIUM, 3.4), numbers={"potassium": 3.2}, **hypo) is None


def test_a_rate_worsens_by_the_per_hour_step() -> None:
    fall = {"rule": Rule.OSMOLALITY_FALL_TOO_FAST, "priority": MEDIUM}
    step = STEPS.worsening_step_per_hour.osmolality
    assert reason("update", Paged(MEDIUM, 10.0), numbers={"rate_per_hour": 10.0 + step}, **fall) is Reason.WORSENED
    assert reason("update", Paged(MEDIUM, 10.0), numbers={"rate_per_hour": 10.0 + step / 2}, **fall) is None


def test_a_priority_rise_pages_even_without_a_worsening() -> None:
    hypo = {"rule": Rule.HYPOKALEMIA_ON_INSULIN, "numbers": {"potassium": 2.95}}
    assert reason("update", Paged(MEDIUM, 3.05), priority=HIGH, **hypo) is Reason.PRIORITY_ROSE


def test_a_priority_fall_does_not_page() -> None:
    assert reason("update", Paged(HIGH, 118.0), **sodium_low(118, priority=MEDIUM)) is None


def test_a_rule_without_a_measure_pages_on_every_version() -> None:
    got = page_reason(change="update", last=Paged(HIGH, 118.0), steps=STEPS, measures={}, **sodium_low(118))  # type: ignore[arg-type]
    assert got is Reason.UNMEASURED


def test_a_finding_without_its_measure_number_pages() -> None:
    got = reason("update", Paged(HIGH, 118.0), rule=Rule.SODIUM_CRITICAL_LOW, priority=HIGH, numbers={})
    assert got is Reason.UNMEASURED


def test_a_flag_with_nothing_recorded_as_paged_pages() -> None:
    # A Flag raised before the responder topic existed has no record of what was sent.
    assert reason("update", Paged(None, None), **sodium_low(118)) is Reason.UNMEASURED


@pytest.mark.parametrize(("got", "reopens"), [(Reason.RAISED, True), (Reason.PRIORITY_ROSE, True),
                                              (Reason.WORSENED, False), (Reason.CLOSED, False)])
def test_only_raising_and_a_priority_rise_reopen_escalation(got: Reason, reopens: bool) -> None:
    assert got.reopens_escalation is reopens
