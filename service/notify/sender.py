"""One rest-hook POST of a notification Bundle → DeliveryOutcome. The only module here doing I/O.

Subscriptions R5 Backport IG, channels page (rest-hook): the POST's Content-Type SHALL equal
``channel.payload`` and each ``channel.header`` SHALL be sent as an HTTP header. Those headers carry
the subscriber's credentials and the body may carry PHI, so this module logs nothing and puts
neither in the outcome; the caller logs the outcome's fields, which hold neither.

Redirects are not followed: following one would hand the subscriber's credentials to whatever host
the redirect names.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import httpx

from service.notify.headers import HeaderError, parse_header

__all__ = ["DeliveryOutcome", "deliver"]

# 408 Request Timeout and 429 Too Many Requests say "later"; every other 4xx says "never like this".
_RETRYABLE_4XX = frozenset({408, 429})


@dataclass(frozen=True, slots=True)
class DeliveryOutcome:
    ok: bool
    status: int | None  # the HTTP status, None when no response arrived
    # None when ok; else timeout | connect | transport | http-3xx | http-4xx | http-5xx
    # | invalid-header | invalid-endpoint
    error: str | None
    retryable: bool
    elapsed_ms: int
    retry_after_s: float | None = None  # the endpoint's Retry-After in seconds (408/429/503), if given


def deliver(
    client: httpx.Client,
    *,
    endpoint: str,
    headers: list[str] | tuple[str, ...],
    content_type: str,
    body: bytes,
    timeout_s: float,
) -> DeliveryOutcome:
    """POST ``body`` to ``endpoint``; classify what happened. Never raises for network trouble."""
    if timeout_s <= 0:
        raise ValueError("timeout_s must be positive")
    started = time.perf_counter()
    try:
        pairs = [parse_header(h) for h in headers]
    except HeaderError:
        # A stored header that cannot be sent will not get better by retrying.
        return DeliveryOutcome(False, None, "invalid-header", False, 0)
    pairs.append(("Content-Type", content_type))
    try:
        response = client.post(endpoint, content=body, headers=pairs, timeout=httpx.Timeout(timeout_s),
                               follow_redirects=False)
    except (httpx.InvalidURL, httpx.UnsupportedProtocol):  # a stored endpoint we cannot use at all
        return DeliveryOutcome(False, None, "invalid-endpoint", False, _ms(started))
    except httpx.TimeoutException:  # connect, read, write or pool timeout
        return DeliveryOutcome(False, None, "timeout", True, _ms(started))
    except httpx.ConnectError:  # refused, unreachable, DNS failure, TLS handshake failure
        return DeliveryOutcome(False, None, "connect", True, _ms(started))
    except httpx.TransportError:  # the peer broke the exchange off (reset, protocol error)
        return DeliveryOutcome(False, None, "transport", True, _ms(started))
    elapsed, code = _ms(started), response.status_code
    if 200 <= code < 300:
        return DeliveryOutcome(True, code, None, False, elapsed)
    if code >= 500:
        return DeliveryOutcome(False, code, "http-5xx", True, elapsed, _retry_after(response))
    if code >= 400:
        retryable = code in _RETRYABLE_4XX
        return DeliveryOutcome(False, code, "http-4xx", retryable, elapsed,
                               _retry_after(response) if retryable else None)
    return DeliveryOutcome(False, code, "http-3xx", False, elapsed)


def _ms(started: float) -> int:
    return int((time.perf_counter() - started) * 1000)


def _retry_after(response: httpx.Response) -> float | None:
    """Retry-After as delay-seconds (RFC 9110 §10.2.3). The HTTP-date form is not read: the sender has
    no clock of the service's to compare it with, and the backoff schedule still spaces retries out."""
    raw = response.headers.get("Retry-After")
    if raw is None:
        return None
    raw = raw.strip()
    return float(raw) if raw.isdigit() else None
