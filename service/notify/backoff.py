"""When to try a failed notification again, and when to stop. Pure (the random source is injected).

Full jitter: the n-th retry waits a uniform random time in ``[0, min(cap, base * 2**(n-1))]``. Spreading
retries over the whole window is what keeps many subscriptions that failed together (one paging
gateway down) from retrying together; decorrelated jitter spreads about as well but its schedule
depends on the previous delay, which a restarted dispatcher would have to store.

A server's ``Retry-After`` is a floor: we never come back sooner than it asked, but no later than
``retry_after_cap_s`` so one answer cannot park a subscription for a day. After ``max_attempts`` failed
attempts, or on any failure that retrying cannot fix, the decision is GiveUp: the subscription goes to
``error`` (Subscriptions R5 Backport IG, errors page) and only its owner re-activates it.

Urgent rows (a high-priority Flag is waiting) use ``urgent_cap_s`` as the cap, so once an endpoint is
back a page waits at most that long for the next try. Trying more often must not mean giving up
sooner: the urgent schedule gets as many attempts as it needs for its waits, at their upper bounds,
to add up to at least the normal schedule's, so both keep trying for about the same time.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass
from datetime import datetime, timedelta

__all__ = ["GiveUp", "Retry", "RetryPolicy", "ceiling", "delay", "next_attempt_at"]

# Beyond this many doublings any sane cap has long been reached; stop before floats overflow.
_MAX_DOUBLINGS = 62


@dataclass(frozen=True, slots=True)
class RetryPolicy:
    base_s: float = 2.0
    cap_s: float = 300.0
    max_attempts: int = 8  # attempts in all, the first included; defaults wait at most 254 s in all
    retry_after_cap_s: float = 3600.0
    urgent_cap_s: float | None = None  # no urgent retry waits longer (None: urgent rows wait as others)

    def __post_init__(self) -> None:
        if self.base_s <= 0 or self.cap_s < self.base_s:
            raise ValueError("need 0 < base_s <= cap_s")
        if self.max_attempts < 1:
            raise ValueError("max_attempts must be at least 1")
        if self.retry_after_cap_s < 0:
            raise ValueError("retry_after_cap_s must not be negative")
        if self.urgent_cap_s is not None and self.urgent_cap_s <= 0:
            raise ValueError("urgent_cap_s must be positive")

    def cap(self, urgent: bool) -> float:
        """The longest wait between two tries (never below the first wait's ceiling, ``base_s``)."""
        if urgent and self.urgent_cap_s is not None:
            return min(self.cap_s, max(self.base_s, self.urgent_cap_s))
        return self.cap_s

    def attempts(self, urgent: bool) -> int:
        """Attempts in all, the first included, before giving up."""
        cap = self.cap(urgent)
        if cap == self.cap_s:
            return self.max_attempts
        target = _window(self.max_attempts, self.base_s, self.cap_s)
        waited, attempts = 0.0, 1
        while waited < target and ceiling(attempts, self.base_s, cap) < cap:  # still doubling
            waited += ceiling(attempts, self.base_s, cap)
            attempts += 1
        if waited < target:  # the rest at the cap
            attempts += math.ceil((target - waited) / cap - 1e-9)
        return attempts


@dataclass(frozen=True, slots=True)
class Retry:
    at: datetime
    delay_s: float


@dataclass(frozen=True, slots=True)
class GiveUp:
    attempts: int
    reason: str  # "max-attempts" | "not-retryable"


def ceiling(attempt: int, base: float, cap: float) -> float:
    """The upper bound of the wait after failed attempt number ``attempt`` (1-based): non-decreasing."""
    if attempt < 1:
        raise ValueError("attempt is 1-based")
    if base <= 0 or cap < base:
        raise ValueError("need 0 < base <= cap")
    doublings = attempt - 1
    return cap if doublings > _MAX_DOUBLINGS else min(cap, base * float(2**doublings))


def _window(attempts: int, base: float, cap: float) -> float:
    """The sum of the wait ceilings of a schedule of ``attempts`` attempts (``attempts - 1`` waits)."""
    doubling = min(attempts - 1, _MAX_DOUBLINGS)
    total = sum(ceiling(n, base, cap) for n in range(1, doubling + 1))
    return total + (attempts - 1 - doubling) * cap


def delay(attempt: int, base: float, cap: float, rng: random.Random) -> float:
    """Full-jitter wait in seconds after failed attempt ``attempt``: uniform on [0, ceiling]."""
    return rng.uniform(0.0, ceiling(attempt, base, cap))


def next_attempt_at(
    now: datetime,
    attempt: int,
    *,
    policy: RetryPolicy,
    rng: random.Random,
    retryable: bool = True,
    retry_after_s: float | None = None,
    urgent: bool = False,
) -> Retry | GiveUp:
    """After failed attempt number ``attempt`` (1-based) at ``now``: when to try next, or give up.

    ``urgent``: a high-priority notification is waiting, so the urgent schedule applies.
    """
    if attempt < 1:
        raise ValueError("attempt is 1-based")
    if not retryable:
        return GiveUp(attempt, "not-retryable")
    if attempt >= policy.attempts(urgent):
        return GiveUp(attempt, "max-attempts")
    wait = delay(attempt, policy.base_s, policy.cap(urgent), rng)
    if retry_after_s is not None and retry_after_s > 0:
        wait = max(wait, min(retry_after_s, policy.retry_after_cap_s))
    return Retry(now + timedelta(seconds=wait), wait)
