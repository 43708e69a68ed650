"""Offset-less date-times read in the lab's zone: the clock changes make some local times ambiguous or absent.

Europe/London changes on the last Sunday of March and October at 01:00 UTC (EU summer-time
directive 2000/84/EC; the IANA tz database): on 2026-03-29 the clocks go from 01:00 GMT to 02:00
BST, so 01:30 does not exist; on 2026-10-25 they go from 02:00 BST back to 01:00 GMT, so 01:30
happens twice. zoneinfo follows PEP 495: ``fold=0`` is the earlier reading (the offset before the
change), ``fold=1`` the later one.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from functools import lru_cache
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from hypothesis import event, given, settings
from hypothesis import strategies as st

from service.errors import Issue
from service.fhir.datetimes import fix_offsetless

LONDON = ZoneInfo("Europe/London")
AMBIGUOUS = "2026-10-25T01:30:00"
NONEXISTENT = "2026-03-29T01:30:00"


def read(value: str, zone: str = "Europe/London", on_transition: str = "refuse") -> tuple[Issue, str]:
    resource: dict[str, Any] = {"resourceType": "Observation", "effectiveDateTime": value}
    (issue,) = fix_offsetless(resource, "Observation", zone, on_transition=on_transition)
    return issue, resource["effectiveDateTime"]


def test_an_ordinary_local_time_is_read_in_the_zone_with_a_warning() -> None:
    issue, value = read("2026-07-01T09:15:00")
    assert issue.severity == "warning"
    assert value == "2026-07-01T09:15:00+01:00"


def test_an_ambiguous_local_time_is_refused_by_default_naming_both_readings() -> None:
    issue, value = read(AMBIGUOUS)
    assert (issue.severity, issue.status, issue.expression) == ("error", 422, ("Observation.effectiveDateTime",))
    assert "twice" in issue.message and "clocks go back" in issue.message
    assert "2026-10-25T01:30:00+01:00" in issue.message and "2026-10-25T01:30:00+00:00" in issue.message
    assert value == AMBIGUOUS  # left as sent


def test_a_nonexistent_local_time_is_refused_by_default_naming_the_gap() -> None:
    issue, value = read(NONEXISTENT)
    assert (issue.severity, issue.status, issue.expression) == ("error", 422, ("Observation.effectiveDateTime",))
    assert "does not exist" in issue.message and "clocks go forward" in issue.message
    assert value == NONEXISTENT


def test_an_ambiguous_local_time_accepted_is_read_as_the_first_occurrence_fold_0() -> None:
    issue, value = read(AMBIGUOUS, on_transition="accept")
    assert issue.severity == "warning" and "twice" in issue.message
    first = datetime(2026, 10, 25, 1, 30, tzinfo=LONDON, fold=0)
    second = datetime(2026, 10, 25, 1, 30, tzinfo=LONDON, fold=1)
    # Compared in UTC: under PEP 495 a time in a fold never equals one of another zone.
    assert datetime.fromisoformat(value) == first.astimezone(UTC)
    assert first.utcoffset() == timedelta(hours=1) and second.utcoffset() == timedelta(0)
    assert second.isoformat() in issue.message  # the other reading is named


def test_a_nonexistent_local_time_accepted_is_read_with_the_offset_before_the_change() -> None:
    issue, value = read(NONEXISTENT, on_transition="accept")
    assert issue.severity == "warning" and "does not exist" in issue.message
    # fold=0 in a gap takes the offset in force before it (GMT): 01:30Z, which is 02:30 BST.
    assert datetime.fromisoformat(value) == datetime(2026, 3, 29, 1, 30, tzinfo=LONDON, fold=0).astimezone(UTC)
    assert value == "2026-03-29T01:30:00+00:00"
    assert "2026-03-29T02:30:00+01:00" in issue.message


def test_the_edges_of_the_gap_and_the_overlap_are_ordinary_times() -> None:
    for edge in ("2026-03-29T00:59:59", "2026-03-29T02:00:00", "2026-10-25T00:59:59", "2026-10-25T02:00:00"):
        issue, _ = read(edge)
        assert issue.severity == "warning", edge


def test_an_impossible_calendar_date_is_refused_not_crashed_on() -> None:
    issue, _ = read("2026-02-30T10:00:00")
    assert issue.severity == "error" and "not a valid date-time" in issue.message


def test_without_a_lab_zone_offsetless_times_are_refused_as_before() -> None:
    resource = {"resourceType": "Observation", "effectiveDateTime": AMBIGUOUS}
    (issue,) = fix_offsetless(resource, "Observation", None)
    assert issue.severity == "error" and "no UTC offset" in issue.message


# -- properties over random local times ------------------------------------------------------------

ZONES = ("Europe/London", "America/New_York", "Australia/Lord_Howe", "Pacific/Chatham", "America/St_Johns")
# Lord Howe moves its clocks by 30 minutes, Chatham sits at +12:45/+13:45: changes that are not whole hours.


def local_instants(naive: datetime, tz: ZoneInfo) -> set[datetime]:
    """The UTC instants whose wall time in ``tz`` is ``naive``, found without fold: 0, 1 or 2 of them."""
    offsets = {tz.utcoffset(naive + timedelta(hours=h)) for h in range(-36, 37)}
    found = set()
    for offset in offsets:
        assert offset is not None
        instant = (naive - offset).replace(tzinfo=UTC)
        if instant.astimezone(tz).replace(tzinfo=None) == naive:
            found.add(instant)
    return found


@lru_cache(maxsize=None)
def changes(zone: str, year: int) -> tuple[datetime, ...]:
    """The wall times at which ``zone``'s clocks change in ``year``, as the clock read just before."""
    tz = ZoneInfo(zone)
    found = []
    t = datetime(year, 1, 1, tzinfo=UTC)
    while t.year == year:
        nxt = t + timedelta(hours=6)
        before = t.astimezone(tz).utcoffset()
        if before != nxt.astimezone(tz).utcoffset():
            lo, hi = t, nxt  # narrow down to the minute of the change
            while hi - lo > timedelta(minutes=1):
                mid = lo + (hi - lo) / 2
                lo, hi = (mid, hi) if mid.astimezone(tz).utcoffset() == before else (lo, mid)
            assert before is not None
            found.append(hi.replace(tzinfo=None, second=0, microsecond=0) + before)  # changes fall on minutes
        t = nxt
    return tuple(found)


@st.composite
def local_times(draw: st.DrawFn) -> tuple[str, datetime]:
    """A zone and a wall time: half near one of its clock changes (where the trouble is), half anywhere."""
    zone = draw(st.sampled_from(ZONES))
    year = draw(st.integers(2024, 2030))
    near = changes(zone, year)
    if near and draw(st.booleans()):
        base = draw(st.sampled_from(near))
        naive = base + timedelta(minutes=draw(st.integers(-90, 90)))
    else:
        naive = datetime(year, 1, 1) + timedelta(minutes=draw(st.integers(0, 365 * 24 * 60 - 1)))
    return zone, naive.replace(second=draw(st.sampled_from([0, 0, 30, 59])))


@settings(max_examples=400, deadline=None)
@given(local_times())
def test_every_accepted_time_round_trips_and_every_refused_one_is_truly_ambiguous_or_absent(
    case: tuple[str, datetime],
) -> None:
    zone, naive = case
    tz = ZoneInfo(zone)
    issue, value = read(naive.isoformat(), zone)
    instants = local_instants(naive, tz)
    event(f"{len(instants)} instants")  # --hypothesis-show-statistics: the doubtful cases are met
    if issue.severity == "warning":
        aware = datetime.fromisoformat(value)
        assert aware.astimezone(tz).replace(tzinfo=None) == naive
        assert len(instants) == 1
    else:
        assert len(instants) in (0, 2)
        assert ("does not exist" if not instants else "twice") in issue.message


@settings(max_examples=400, deadline=None)
@given(local_times())
def test_when_accepting_every_doubtful_time_says_so_and_reads_a_real_candidate(case: tuple[str, datetime]) -> None:
    zone, naive = case
    tz = ZoneInfo(zone)
    issue, value = read(naive.isoformat(), zone, on_transition="accept")
    instants = local_instants(naive, tz)
    aware = datetime.fromisoformat(value)
    assert issue.severity == "warning"
    if len(instants) == 1:
        assert aware == instants.pop()
        assert "twice" not in issue.message and "does not exist" not in issue.message
    elif len(instants) == 2:
        assert aware == min(instants)  # the first occurrence
        assert "twice" in issue.message
    else:
        assert "does not exist" in issue.message
        # Read with the offset in force just before the gap.
        assert aware.utcoffset() == tz.utcoffset(naive - timedelta(hours=3))


def test_the_zones_of_the_property_tests_do_change_their_clocks() -> None:
    # Otherwise the properties above would never meet a doubtful time.
    assert all(len(changes(zone, 2026)) == 2 for zone in ZONES)


@pytest.mark.parametrize("value", [AMBIGUOUS, NONEXISTENT])
def test_transition_finder_agrees_with_the_published_london_dates(value: str) -> None:
    assert any(abs(datetime.fromisoformat(value) - c) < timedelta(hours=2) for c in changes("Europe/London", 2026))
