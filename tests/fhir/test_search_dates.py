"""Search date values cover the implicit range FHIR gives them (R4 search.html#date), leap seconds included."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import pytest

from service.errors import RequestRejected
from service.fhir.search import date_bounds


def test_a_leap_second_in_a_search_date_is_read_not_refused() -> None:
    # FHIR R4 dateTime/instant allow second 60 (datatypes.html; RFC 3339 section 5.7: 2016-12-31T23:59:60Z
    # was a real leap second, IERS Bulletin C 52).
    low, high = date_bounds(["ge2016-12-31T23:59:60Z"])
    assert low == datetime(2016, 12, 31, 23, 59, 59, 999999, tzinfo=UTC) and high is None


def test_an_instant_covers_its_second() -> None:
    low, high = date_bounds(["2024-03-01T10:00:00Z"])
    assert low is not None and high is not None and high - low == timedelta(seconds=1)


def test_a_day_covers_the_day() -> None:
    assert date_bounds(["2024-03-01"]) == (datetime(2024, 3, 1, tzinfo=UTC), datetime(2024, 3, 2, tzinfo=UTC))


@pytest.mark.parametrize("value", ["2024-13-01", "0001-01-01T00:00:00+14:00", "2024-03-01T10:00:00", "soon"])
def test_a_date_that_names_no_instant_is_a_clear_400(value: str) -> None:
    with pytest.raises(RequestRejected) as err:
        date_bounds([value])
    assert value in err.value.issues[0].message
