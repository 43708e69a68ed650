"""Collection and arrival times, and which results no rule can read: pure functions, no store."""

# Critical values (site-policy defaults, RCPath G158 2017; Kost 1990): potassium <= 2.5 mmol/L,
# sodium <= 120 mmol/L are critical low.

from __future__ import annotations

from datetime import timedelta

import pytest

from service.domain.arrival import duration_words


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
