"""Retry schedule: capped exponential backoff with full jitter, Retry-After floor, give-up decision."""

from __future__ import annotations

import random
from datetime import UTC, datetime, timedelta

import pytest

from service.notify.backoff import GiveUp, Retry, RetryPolicy, ceiling, delay, next_attempt_at

NOW = datetime(2024, 3, 1, 8, 0, tzinfo=UTC)


def test_ceiling_doubles_then_holds_at_the_cap() -> None:
    assert [ceiling(n, 2.0, 60.0) for n in range(1, 8)] == [2.0, 4.0, 8.0, 16.0, 32.0, 60.0, 60.0]


def test_ceiling_is_monotone_and_bounded_even_for_huge_attempts() -> None:
    values = [ceiling(n, 0.5, 300.0) for n in range(1, 2000)]
    assert all(a <= b for a, b in zip(values, values[1:], strict=False))
    assert max(values) == 300.0
    assert ceiling(10**6, 1.0, 30.0) == 30.0  # no float overflow


def test_seeded_schedule_is_reproducible_and_within_bounds() -> None:
    first = [delay(n, 2.0, 300.0, random.Random(7)) for n in range(1, 10)]
    again = [delay(n, 2.0, 300.0, random.Random(7)) for n in range(1, 10)]
    assert first == again
    rng = random.Random(11)
    for n in range(1, 40):
        for _ in range(50):
            d = delay(n, 2.0, 300.0, rng)
            assert 0.0 <= d <= ceiling(n, 2.0, 300.0)


def test_full_jitter_spreads_over_the_whole_window() -> None:
    # Full jitter (not "equal" jitter): small waits occur too, so failures that happened together
    # do not retry together.
    rng = random.Random(3)
    samples = [delay(6, 2.0, 64.0, rng) for _ in range(2000)]
    assert min(samples) < 64.0 * 0.05
    assert max(samples) > 64.0 * 0.95
    assert 64.0 * 0.4 < sum(samples) / len(samples) < 64.0 * 0.6


def test_delay_depends_on_the_injected_rng_only() -> None:
    class Fixed(random.Random):
        def uniform(self, a: float, b: float) -> float:
            return b  # the top of the window

    assert delay(3, 2.0, 300.0, Fixed()) == 8.0
    assert delay(30, 2.0, 300.0, Fixed()) == 300.0


def test_next_attempt_at_retries_until_max_attempts() -> None:
    policy = RetryPolicy(base_s=1.0, cap_s=10.0, max_attempts=4)
    rng = random.Random(5)
    decisions = [next_attempt_at(NOW, n, policy=policy, rng=rng) for n in range(1, 6)]
    assert [type(d) for d in decisions] == [Retry, Retry, Retry, GiveUp, GiveUp]
    for n, d in enumerate(decisions[:3], start=1):
        assert isinstance(d, Retry)
        assert d.at == NOW + timedelta(seconds=d.delay_s)
        assert 0.0 <= d.delay_s <= ceiling(n, 1.0, 10.0)
    assert decisions[3] == GiveUp(4, "max-attempts")


def test_not_retryable_gives_up_at_once() -> None:
    d = next_attempt_at(NOW, 1, policy=RetryPolicy(), rng=random.Random(1), retryable=False)
    assert d == GiveUp(1, "not-retryable")


def test_retry_after_is_a_floor_with_its_own_cap() -> None:
    policy = RetryPolicy(base_s=1.0, cap_s=4.0, max_attempts=5, retry_after_cap_s=120.0)
    d = next_attempt_at(NOW, 1, policy=policy, rng=random.Random(1), retry_after_s=30)
    assert isinstance(d, Retry) and d.delay_s == 30.0
    d = next_attempt_at(NOW, 1, policy=policy, rng=random.Random(1), retry_after_s=86400)
    assert isinstance(d, Retry) and d.delay_s == 120.0
    # A Retry-After shorter than the jittered wait does not shorten it.
    class Top(random.Random):
        def uniform(self, a: float, b: float) -> float:
            return b
    d = next_attempt_at(NOW, 3, policy=policy, rng=Top(), retry_after_s=1)
    assert isinstance(d, Retry) and d.delay_s == 4.0


@pytest.mark.parametrize("kwargs", [dict(base_s=0), dict(base_s=5, cap_s=1), dict(max_attempts=0),
                                    dict(retry_after_cap_s=-1), dict(urgent_cap_s=0)])
def test_policy_refuses_nonsense(kwargs: dict[str, float]) -> None:
    with pytest.raises(ValueError):
        RetryPolicy(**kwargs)  # type: ignore[arg-type]


def test_attempt_is_one_based() -> None:
    with pytest.raises(ValueError):
        ceiling(0, 1.0, 2.0)
    with pytest.raises(ValueError):
        next_attempt_at(NOW, 0, policy=RetryPolicy(), rng=random.Random(1))


class _Top(random.Random):
    def uniform(self, a: float, b: float) -> float:
        return b  # the top of the window


def test_an_urgent_retry_never_waits_longer_than_the_urgent_cap() -> None:
    policy = RetryPolicy(base_s=2.0, cap_s=300.0, max_attempts=12, urgent_cap_s=10.0)
    waits = [next_attempt_at(NOW, n, policy=policy, rng=_Top(), urgent=True) for n in range(1, 12)]
    assert [w.delay_s for w in waits if isinstance(w, Retry)] == [2.0, 4.0, 8.0] + [10.0] * 8
    normal = next_attempt_at(NOW, 8, policy=policy, rng=_Top())
    assert isinstance(normal, Retry) and normal.delay_s == 256.0  # the normal schedule is unchanged


def test_an_urgent_schedule_keeps_trying_at_least_as_long_as_the_normal_one() -> None:
    policy = RetryPolicy(base_s=2.0, cap_s=300.0, max_attempts=12, urgent_cap_s=10.0)
    # Normal: waits of at most 2+4+...+256+300+300+300 = 1410 s over 11 retries. Urgent: 2+4+8, then
    # 10 s each, so 140 more waits reach 1410 s: 144 attempts in all.
    assert policy.attempts(urgent=False) == 12
    assert policy.attempts(urgent=True) == 144
    urgent_window = sum(ceiling(n, 2.0, 10.0) for n in range(1, policy.attempts(urgent=True)))
    normal_window = sum(ceiling(n, 2.0, 300.0) for n in range(1, 12))
    assert urgent_window >= normal_window > urgent_window - 10.0
    assert isinstance(next_attempt_at(NOW, 143, policy=policy, rng=_Top(), urgent=True), Retry)
    assert next_attempt_at(NOW, 144, policy=policy, rng=_Top(), urgent=True) == GiveUp(144, "max-attempts")


def test_without_an_urgent_cap_urgent_rows_follow_the_normal_schedule() -> None:
    policy = RetryPolicy(base_s=1.0, cap_s=10.0, max_attempts=4)
    assert policy.attempts(urgent=True) == 4
    d = next_attempt_at(NOW, 3, policy=policy, rng=_Top(), urgent=True)
    assert isinstance(d, Retry) and d.delay_s == 4.0


def test_an_urgent_cap_below_the_base_waits_the_base() -> None:
    policy = RetryPolicy(base_s=2.0, cap_s=60.0, max_attempts=3, urgent_cap_s=0.5)
    d = next_attempt_at(NOW, 1, policy=policy, rng=_Top(), urgent=True)
    assert isinstance(d, Retry) and d.delay_s == 2.0
