"""What each board row says, and the order the rows come in."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import pytest
from hypothesis import given
from hypothesis import strategies as st

from service.board.views import AckFacts, FlagFacts, LatestValue, board_rows, duration_words, local_time

NOW = datetime(2026, 7, 1, 12, 0, tzinfo=UTC)


def facts(fid: str, priority: str = "high", raised: timedelta = timedelta(hours=1), **kw: object) -> FlagFacts:
    base: dict[str, object] = dict(
        id=fid, version_id=1, rule="sodium-critical-low", rule_display="Sodium critical low", priority=priority,
        sentence="s", raised_at=NOW - raised, identifiers=["MRN-1", "Patient/p1"], encounter=None, latest=None,
        ack=None, escalations=0, last_updated=NOW)
    base.update(kw)
    return FlagFacts(**base)  # type: ignore[arg-type]


def test_rows_come_highest_priority_first_then_longest_waiting() -> None:
    rows = board_rows([facts("new-high", raised=timedelta(minutes=5)), facts("old-low", "low", timedelta(hours=9)),
                       facts("old-high", raised=timedelta(hours=3)), facts("medium", "medium")], NOW, None)
    assert [r.id for r in rows] == ["old-high", "new-high", "medium", "old-low"]


@given(st.lists(st.tuples(st.sampled_from(["high", "medium", "low"]), st.integers(0, 10_000)), max_size=30))
def test_the_order_never_puts_a_lower_priority_above_a_higher_one(spec: list[tuple[str, int]]) -> None:
    rows = board_rows([facts(f"f{i}", p, timedelta(minutes=m)) for i, (p, m) in enumerate(spec)], NOW, None)
    ranks = [{"PH": 0, "PM": 1, "PL": 2}[r.priority_code] for r in rows]
    assert ranks == sorted(ranks)


def test_priority_has_its_flag_priority_code_and_display() -> None:
    # http://hl7.org/fhir/flag-priority-code: PH "High priority", PM "Medium priority", PL "Low priority".
    rows = board_rows([facts("a"), facts("b", "medium"), facts("c", "low")], NOW, None)
    assert [(r.priority_code, r.priority_display, r.priority_word) for r in rows] == [
        ("PH", "High priority", "High"), ("PM", "Medium priority", "Medium"), ("PL", "Low priority", "Low")]


def test_the_patient_is_named_as_the_feed_sent_it_with_the_other_names_beside() -> None:
    row = board_rows([facts("a")], NOW, None)[0]
    assert (row.patient, row.other_identifiers) == ("MRN-1", ("Patient/p1",))


def test_a_patient_with_no_name_sent_says_so() -> None:
    assert board_rows([facts("a", identifiers=[])], NOW, None)[0].patient == "(no identifier sent)"


@pytest.mark.parametrize(("minutes", "words"), [(0, "0 min"), (59, "59 min"), (60, "1 h 00 min"),
                                                (125, "2 h 05 min"), (24 * 60, "1 d 0 h"), (3 * 1440 + 250, "3 d 4 h")])
def test_durations_are_exact_to_the_minute(minutes: int, words: str) -> None:
    assert duration_words(timedelta(minutes=minutes, seconds=59)) == words


def test_a_time_in_the_future_reads_as_zero_not_negative() -> None:
    assert duration_words(timedelta(minutes=-3)) == "0 min"


def test_times_are_on_the_labs_clock_with_the_zone_named() -> None:
    # Europe/London is on BST (UTC+1) on 1 July (IANA tz database).
    assert local_time(NOW, ZoneInfo("Europe/London")) == "01 Jul 13:00 BST"
    assert local_time(NOW, None) == "01 Jul 12:00 UTC"


def test_an_acknowledgement_made_before_the_priority_rose_is_shown_as_not_covering() -> None:
    ack = AckFacts(by="Nurse A", at=NOW - timedelta(minutes=30), note="seen", covers=False)
    row = board_rows([facts("a", ack=ack)], NOW, None)[0]
    assert row.ack == "Nurse A, 01 Jul 11:30 UTC" and row.ack_stale and row.ack_note == "seen"


def test_the_latest_value_is_in_the_labs_unit() -> None:
    latest = LatestValue(analyte="glucose", value="450", unit="mg/dL", collected=NOW - timedelta(hours=1))
    row = board_rows([facts("a", latest=latest)], NOW, None)[0]
    assert row.latest == "Glucose 450 mg/dL" and row.latest_time == "01 Jul 11:00 UTC"
