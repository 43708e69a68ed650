"""Collection and arrival times, and which results no rule can read: pure functions, no store."""

# Critical values (site-policy defaults, RCPath G158 2017; Kost 1990): potassium <= 2.5 mmol/L,
# sodium <= 120 mmol/L are critical low.

from __future__ import annotations

from dataclasses import replace
from datetime import timedelta

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.domain.arrival import duration_words, note_arrival_delay, note_late, window_before
from service.domain.coverage import unread_exposure, unread_result
from service.domain.findings import Rule
from service.domain.rules import evaluate
from service.domain.values import Analyte, ResultStatus, Specimen
from tests.domain.test_properties import POLICY, results
from tests.domain.test_support import at, insulin, k, lab, na, policy, timeline

H = timedelta(hours=1)


@pytest.mark.parametrize(("delta", "words"), [
    (timedelta(days=4, hours=2), "4 d 2 h"),
    (timedelta(days=4, hours=2, minutes=59), "4 d 2 h"),
    (timedelta(days=1), "1 d"),
    (timedelta(hours=3, minutes=10), "3 h 10 min"),
    (timedelta(hours=2), "2 h"),
    (timedelta(minutes=5), "5 min"),
    (timedelta(seconds=20), "0 min"),
])
def test_durations_are_said_in_days_hours_and_minutes(delta: timedelta, words: str) -> None:
    assert duration_words(delta) == words


def test_a_skew_is_rounded_up_so_it_never_reads_as_within_the_tolerance() -> None:
    assert duration_words(timedelta(minutes=5, seconds=1), round_up=True) == "6 min"
    assert duration_words(timedelta(hours=3, minutes=10), round_up=True) == "3 h 10 min"


# -- the window before a late result -------------------------------------------------------------------


def test_the_window_before_a_time_holds_only_what_was_drawn_in_the_look_back_before_it() -> None:
    old, inside, anchor, after = na(125, 0), na(124, 10), na(118, 80), na(130, 90)
    drip = insulin(70, 75)
    gone = insulin(1, 2)
    window = window_before(timeline([old, inside, anchor, after], [drip, gone]), at(80), 72 * H)
    assert window.results == (inside, anchor)
    assert window.exposures == (drip,)
    assert (window.window_start, window.window_end) == (at(8), at(80))


def test_a_late_critical_result_judged_in_its_own_window_raises_its_finding() -> None:
    late = k(2.3, 0)
    newer = k(4.1, 100)  # a later normal result clears it in any window that includes both
    window = window_before(timeline([late, newer]), late.effective, 72 * H)
    (finding,) = evaluate(window, POLICY, late.effective)
    assert finding.rule is Rule.POTASSIUM_CRITICAL_LOW and finding.evidence == (late.reference,)


# -- the sentences ------------------------------------------------------------------------------------


def test_a_late_finding_says_it_arrived_late_and_by_how_much() -> None:
    (finding,) = evaluate(timeline([k(2.3, 0)]), POLICY, at(0))
    noted = note_late(finding, delay=timedelta(days=4, hours=2), lookback=72 * H)
    assert noted.sentence.endswith("; arrived late, 4 d 2 h after collection: "
                                   "evaluated in the 72 h ending at its collection time.")
    assert noted.numbers["arrived_after_collection_hours"] == pytest.approx(98.0)
    assert (noted.rule, noted.evidence, noted.episode) == (finding.rule, finding.evidence, finding.episode)


def test_the_delay_of_the_newest_cited_result_is_noted_when_it_exceeds_the_policy_delay() -> None:
    older = replace(na(119, 0), arrived=at(0.2))
    newest = replace(na(118, 1), arrived=at(3.5))
    (finding,) = evaluate(timeline([older, newest]), POLICY, at(4))
    noted = note_arrival_delay(finding, (older, newest), after=timedelta(minutes=60))
    assert noted.sentence.endswith("; newest result arrived 2 h 30 min after collection.")
    assert noted.numbers["arrived_after_collection_hours"] == pytest.approx(2.5)


def test_no_note_when_the_newest_cited_result_arrived_within_the_policy_delay() -> None:
    older = replace(na(118, 0), arrived=at(5))  # late, but no longer the newest evidence
    newest = replace(na(117, 1), arrived=at(1.5))
    (finding,) = evaluate(timeline([older, newest]), POLICY, at(4))
    assert note_arrival_delay(finding, (older, newest), after=timedelta(minutes=60)) == finding


def test_no_note_when_the_arrival_is_unknown() -> None:
    result = na(118, 0)
    (finding,) = evaluate(timeline([result]), POLICY, at(4))
    assert note_arrival_delay(finding, (result,), after=timedelta(minutes=60)) == finding


# -- what no rule can read ------------------------------------------------------------------------------


@pytest.mark.parametrize(("result", "code"), [
    (lab(Analyte.SODIUM, None, 0), "no-numeric-value"),
    (replace(lab(Analyte.SODIUM, None, 0), status=ResultStatus.REGISTERED), "status-registered"),
    (replace(lab(Analyte.SODIUM, 130, 0), status=ResultStatus.CANCELLED), "status-cancelled"),
    (replace(lab(Analyte.SODIUM, 130, 0), status=ResultStatus.ENTERED_IN_ERROR), "entered-in-error"),
    (lab(Analyte.SODIUM, 40, 0, specimen=Specimen.URINE), "urine"),
    (lab(Analyte.OSMOLALITY, 290, 0, calculated=True), "calculated"),
    (lab(Analyte.UREA, 5.1, 0), "analyte-not-read"),
    (lab(Analyte.SODIUM, 130, 0), None),
    (replace(lab(Analyte.SODIUM, 130, 0), status=ResultStatus.PRELIMINARY), None),
    (lab(Analyte.SODIUM, 118, 0, comparator="<"), None),
    (lab(Analyte.GLUCOSE, 2.0, 0, specimen=Specimen.POINT_OF_CARE), None),
])
def test_each_result_no_rule_can_read_has_a_reason(result, code) -> None:  # type: ignore[no-untyped-def]
    unread = unread_result(result, POLICY)
    assert (unread.code if unread else None) == code
    if unread:
        assert unread.reason


def test_a_specimen_the_site_policy_leaves_out_everywhere_is_not_read() -> None:
    # A site that lists no point-of-care glucose in its levels or crisis rules reads none.
    site = policy(crisis={"glucose_specimens": (Specimen.SERUM_PLASMA, Specimen.WHOLE_BLOOD)})
    site = site.model_copy(update={"levels": tuple(
        lim.model_copy(update={"specimens": (Specimen.SERUM_PLASMA,)}) if lim.analyte is Analyte.GLUCOSE else lim
        for lim in site.levels)})
    unread = unread_result(lab(Analyte.GLUCOSE, 2.0, 0, specimen=Specimen.POINT_OF_CARE), site)
    assert unread is not None and unread.code == "specimen-not-read"


@pytest.mark.parametrize(("exposure", "code"), [
    (insulin(0, route="subcutaneous"), "route-not-counted"),
    (insulin(0, route=None), "route-not-counted"),
    (insulin(0, status="not-done"), "not-given"),
    (insulin(0, status="entered-in-error"), "entered-in-error"),
    (insulin(0), None),
])
def test_each_insulin_administration_no_rule_counts_has_a_reason(exposure, code) -> None:  # type: ignore[no-untyped-def]
    unread = unread_exposure(exposure, POLICY)
    assert (unread.code if unread else None) == code


_RULE_LEVEL = {"no-numeric-value", "urine", "calculated", "analyte-not-read", "specimen-not-read"}


@st.composite
def any_result(draw: st.DrawFn):  # type: ignore[no-untyped-def]
    analyte = draw(st.sampled_from(list(Analyte)))
    value = draw(st.one_of(st.none(), st.floats(min_value=0.5, max_value=400, allow_nan=False)))
    return lab(analyte, value, draw(st.integers(0, 96)) / 2, specimen=draw(st.sampled_from(list(Specimen))),
               calculated=draw(st.booleans()) and analyte is Analyte.OSMOLALITY, obs_id="extra")


@settings(max_examples=300, deadline=None)
@given(results(), any_result())
def test_a_result_called_unread_never_changes_what_the_rules_find(base, extra) -> None:  # type: ignore[no-untyped-def]
    unread = unread_result(extra, POLICY)
    if unread is None or unread.code not in _RULE_LEVEL:
        return
    now = at(60)
    assert evaluate(timeline([*base, extra]), POLICY, now) == evaluate(timeline(base), POLICY, now)


@pytest.mark.parametrize("analyte", [Analyte.SODIUM, Analyte.POTASSIUM, Analyte.GLUCOSE, Analyte.OSMOLALITY])
@pytest.mark.parametrize("specimen", list(Specimen))
@pytest.mark.parametrize("value", [0.5, 1000.0])
def test_a_result_called_readable_is_cited_by_a_finding_at_an_extreme_value(analyte, specimen, value) -> None:  # type: ignore[no-untyped-def]
    result = lab(analyte, value, 0, specimen=specimen)
    if unread_result(result, POLICY) is not None:
        return
    findings = evaluate(timeline([result]), POLICY, at(0))
    assert any(result.reference in f.evidence for f in findings)


def test_an_unread_point_of_care_sodium_does_not_make_a_whole_blood_sodium_look_like_a_jump() -> None:
    # Found by the property above: point-of-care and whole-blood sodium share the direct-ISE method
    # series of the delta check, so a point-of-care 1.0 that no rule reads made the whole-blood 100
    # beside it "moved +99 mmol/L". Sodium 100 is below the critical low of 120 mmol/L (RCPath G158 2017).
    whole_blood = lab(Analyte.SODIUM, 100.0, 0, specimen=Specimen.WHOLE_BLOOD, obs_id="wb")
    poc = lab(Analyte.SODIUM, 1.0, 0, specimen=Specimen.POINT_OF_CARE, obs_id="extra")
    unread = unread_result(poc, POLICY)
    assert unread is not None and unread.code == "specimen-not-read"
    assert evaluate(timeline([whole_blood, poc]), POLICY, at(60)) == evaluate(timeline([whole_blood]), POLICY, at(60))
