"""The refusal limiter on its own: per caller, overall, by the minute, and bounded however many callers."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from service.api.refusals import MAX_COUNTED_CALLERS, RefusalLimiter

T0 = datetime(2026, 3, 2, 12, 0, 5, tzinfo=UTC)


def test_each_caller_is_admitted_up_to_its_limit_per_minute() -> None:
    limiter = RefusalLimiter(per_key=2, overall=100)
    assert [limiter.admit(("client", "a"), T0).record for _ in range(3)] == [True, True, False]
    assert limiter.admit(("client", "b"), T0).record is True


def test_going_over_the_limit_is_noted_once() -> None:
    limiter = RefusalLimiter(per_key=1, overall=100)
    limiter.admit(("client", "a"), T0)
    assert [limiter.admit(("client", "a"), T0).first_over for _ in range(3)] == [True, False, False]


def test_the_count_of_a_minute_is_handed_over_once_the_minute_is_over() -> None:
    limiter = RefusalLimiter(per_key=1, overall=100)
    for _ in range(4):
        limiter.admit(("client", "a"), T0)
    same_minute = limiter.admit(("client", "b"), T0 + timedelta(seconds=30))
    assert same_minute.closed == {}
    after = limiter.admit(("client", "b"), T0 + timedelta(seconds=60))
    assert after.record is True
    assert after.closed == {("client", "a"): 3}
    assert after.closed_at == datetime(2026, 3, 2, 12, 0, tzinfo=UTC)
    assert limiter.admit(("client", "b"), T0 + timedelta(seconds=61)).closed == {}


def test_many_callers_share_one_counter_past_a_bound() -> None:
    limiter = RefusalLimiter(per_key=1, overall=1)
    for i in range(MAX_COUNTED_CALLERS * 3):
        limiter.admit(("address", f"10.0.{i // 250}.{i % 250}"), T0)
    closed = limiter.admit(("client", "x"), T0 + timedelta(minutes=1)).closed
    assert len(closed) == MAX_COUNTED_CALLERS + 1
    assert sum(closed.values()) == MAX_COUNTED_CALLERS * 3 - 1
