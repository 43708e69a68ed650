"""What a Flag version says happened: told from the data alone (pure).

Clinical values, with their sources:
- Sodium at or below 120 mmol/L is critical low (RCPath G158 2017): 118, 116 and 119 are below it.
- Potassium at or above 6.5 mmol/L is critical high (RCPath G158 2017): 7.1 is above it.
- Sodium rising more than 10 mmol/L in 24 h from a nadir below 130 is too fast (the site policy default
  [sodium.rise] limit_24h, with its source beside it in service/policy/default.toml).
"""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

from service.domain.findings import Finding, Rule
from service.domain.rules import evaluate
from service.domain.rules.series import shown
from service.domain.wording import collected_words, narrate, untold, withdrawn_lead
from service.policy import load_policy
from tests.domain.test_support import at, glu, na, timeline

POLICY = load_policy()
NOW = at(30)


def told(*results) -> dict[Rule, Finding]:  # type: ignore[no-untyped-def]
    line = timeline(list(results))
    found = narrate(evaluate(line, POLICY, NOW), line, lambda t: evaluate(t, POLICY, NOW), None)
    return {f.rule: f for f in found}


def test_the_first_dangerous_result_raises() -> None:
    assert told(na(118, 0))[Rule.SODIUM_CRITICAL_LOW].sentence.startswith("Raised: Sodium 118 mmol/L")


def test_a_first_dangerous_result_after_a_safe_one_raises_with_no_previous_value() -> None:
    sentence = told(na(124, 0), na(118, 1))[Rule.SODIUM_CRITICAL_LOW].sentence
    assert sentence.startswith("Raised: ") and "previous" not in sentence


def test_lower_is_worse_for_a_low_limit_and_the_previous_value_is_named() -> None:
    sentence = told(na(118, 0), na(116, 1))[Rule.SODIUM_CRITICAL_LOW].sentence
    assert sentence.startswith("Worse: ") and "; previous sodium 118 mmol/L;" in sentence


def test_higher_is_better_for_a_low_limit() -> None:
    assert told(na(116, 0), na(119, 1))[Rule.SODIUM_CRITICAL_LOW].sentence.startswith("Better: ")


def test_two_results_of_one_instant_are_one_moment_not_a_trend() -> None:
    # Both at 08:00: nothing was dangerous before that instant, so it is raised, whichever is listed first.
    sentence = told(na(118, 0, obs_id="a"), na(116, 0, obs_id="b"))[Rule.SODIUM_CRITICAL_LOW].sentence
    assert sentence.startswith("Raised: Sodium 116 mmol/L")


def test_a_result_of_another_analyte_after_the_evidence_does_not_change_the_lead() -> None:
    sentence = told(na(118, 0), na(116, 1), glu(5.0, 2))[Rule.SODIUM_CRITICAL_LOW].sentence
    assert sentence.startswith("Worse: ")


def test_a_rise_that_keeps_growing_is_worse_by_its_rise() -> None:
    rise = told(na(110, 0), na(121, 12), na(124, 20))[Rule.SODIUM_RISE_TOO_FAST].sentence
    assert rise.startswith("Worse: ") and "; previous rise 11 mmol/L;" in rise


def test_collection_time_in_utc_says_no_zone_was_set() -> None:
    when = datetime(2026, 3, 29, 0, 30, tzinfo=UTC)
    assert collected_words(when, None) == "2026-03-29 00:30 UTC (no lab time zone set)"


def test_collection_time_across_a_clock_change_reads_the_zone_at_that_instant() -> None:
    # Europe/London moves to UTC+1 at 01:00 UTC on 29 March 2026 (EU summer time, last Sunday in March).
    zone = ZoneInfo("Europe/London")
    assert collected_words(datetime(2026, 3, 29, 0, 30, tzinfo=UTC), zone) == "2026-03-29 00:30 Europe/London"
    assert collected_words(datetime(2026, 3, 29, 1, 30, tzinfo=UTC), zone) == "2026-03-29 02:30 Europe/London"


def test_untold_takes_off_only_a_lead_of_ours() -> None:
    assert untold("Worse: Sodium 116 mmol/L.") == "Sodium 116 mmol/L."
    assert untold("Sodium 116 mmol/L: see note.") == "Sodium 116 mmol/L: see note."


def test_a_withdrawn_level_flag_names_its_result_and_others_say_results() -> None:
    assert withdrawn_lead("potassium-critical-high", {"value": 7.1, "limit": 6.5}).startswith(
        "Withdrawn: the potassium 7.1 mmol/L it rested on was entered in error.")
    assert withdrawn_lead("sodium-rise-too-fast", {"rise": 12.0}).startswith(
        "Withdrawn: the results it rested on were entered in error.")
    assert withdrawn_lead("a-rule-no-longer-known", {}).startswith("Withdrawn: the results")


def test_shown_gives_the_unit_sent_then_the_canonical_value() -> None:
    g = replace(glu(33.3, 0), sent_value=600.0, sent_unit="mg/dL")
    assert shown(g) == "600 mg/dL (33.3 mmol/L)"
    assert shown(replace(g, comparator=">")) == ">600 mg/dL (>33.3 mmol/L)"
    assert shown(replace(g, sent_unit="MMOL/L", sent_value=33.3)) == "33.3 mmol/L"  # same unit, any case
    assert shown(replace(g, sent_unit=None)) == "33.3 mmol/L"  # stored before units were kept
