"""deliver(): one rest-hook POST, classified (respx stands in for the subscriber's endpoint).

Subscriptions R5 Backport IG, channels page: Content-Type SHALL equal channel.payload; each
channel.header SHALL be sent as an HTTP header.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator

import httpx
import pytest
import respx

from service.notify.sender import DeliveryOutcome, deliver

HOOK = "https://pager.example.org/hook"
MIME = "application/fhir+json; fhirVersion=4.0"
BODY = b'{"resourceType":"Bundle","type":"history","entry":[]}'
SECRET = "Bearer s3cret-token"


@pytest.fixture
def router() -> Iterator[respx.MockRouter]:
    with respx.mock(assert_all_called=False) as r:
        yield r


@pytest.fixture
def client() -> Iterator[httpx.Client]:
    with httpx.Client() as c:
        yield c


def send(client: httpx.Client, headers: list[str] | None = None) -> DeliveryOutcome:
    sent = headers if headers is not None else [f"Authorization: {SECRET}"]
    return deliver(client, endpoint=HOOK, headers=sent, content_type=MIME, body=BODY, timeout_s=2.0)


@pytest.mark.parametrize("code", [200, 202, 204])
def test_2xx_is_ok(router: respx.MockRouter, client: httpx.Client, code: int) -> None:
    router.post(HOOK).mock(return_value=httpx.Response(code))
    out = send(client)
    assert out == DeliveryOutcome(True, code, None, False, out.elapsed_ms)
    assert out.elapsed_ms >= 0


def test_headers_body_and_content_type_arrive(router: respx.MockRouter, client: httpx.Client) -> None:
    route = router.post(HOOK).mock(return_value=httpx.Response(200))
    send(client, [f"Authorization: {SECRET}", "X-Team: rrt", "X-Team: night"])
    request = route.calls.last.request
    assert request.headers["Authorization"] == SECRET
    assert request.headers.get_list("X-Team") == ["rrt", "night"]  # repeated headers all sent
    assert request.headers["Content-Type"] == MIME  # equals channel.payload verbatim
    assert request.content == BODY
    assert request.method == "POST"


@pytest.mark.parametrize("code", [400, 401, 403, 404, 410, 422])
def test_4xx_not_retryable(router: respx.MockRouter, client: httpx.Client, code: int) -> None:
    router.post(HOOK).mock(return_value=httpx.Response(code, headers={"Retry-After": "5"}))
    out = send(client)
    assert (out.ok, out.status, out.error, out.retryable, out.retry_after_s) == \
        (False, code, "http-4xx", False, None)


@pytest.mark.parametrize("code", [408, 429])
def test_408_429_retryable_with_retry_after(
    router: respx.MockRouter, client: httpx.Client, code: int
) -> None:
    router.post(HOOK).mock(return_value=httpx.Response(code, headers={"Retry-After": "30"}))
    out = send(client)
    assert (out.ok, out.status, out.error, out.retryable, out.retry_after_s) == \
        (False, code, "http-4xx", True, 30.0)


@pytest.mark.parametrize("value", [None, "Wed, 21 Oct 2026 07:28:00 GMT", "-3", "soon"])
def test_retry_after_absent_or_unreadable_is_none(router: respx.MockRouter, client: httpx.Client,
                                                 value: str | None) -> None:
    headers = {"Retry-After": value} if value is not None else {}
    router.post(HOOK).mock(return_value=httpx.Response(429, headers=headers))
    out = send(client)
    assert out.retryable and out.retry_after_s is None


@pytest.mark.parametrize("code", [500, 502, 503, 504])
def test_5xx_retryable(router: respx.MockRouter, client: httpx.Client, code: int) -> None:
    router.post(HOOK).mock(return_value=httpx.Response(code, headers={"Retry-After": "12"}))
    out = send(client)
    assert (out.ok, out.status, out.error, out.retryable, out.retry_after_s) == \
        (False, code, "http-5xx", True, 12.0)


@pytest.mark.parametrize("exc", [httpx.ReadTimeout, httpx.ConnectTimeout, httpx.WriteTimeout,
                                 httpx.PoolTimeout])
def test_timeouts_retryable(router: respx.MockRouter, client: httpx.Client, exc: type[Exception]) -> None:
    router.post(HOOK).mock(side_effect=exc("timed out"))
    out = send(client)
    assert (out.ok, out.status, out.error, out.retryable) == (False, None, "timeout", True)


def test_connection_refused_retryable(router: respx.MockRouter, client: httpx.Client) -> None:
    router.post(HOOK).mock(side_effect=httpx.ConnectError("[Errno 111] Connection refused"))
    out = send(client)
    assert (out.ok, out.status, out.error, out.retryable) == (False, None, "connect", True)


def test_connection_refused_for_real_on_loopback(client: httpx.Client) -> None:
    # No mock: a port nobody listens on (bound then closed) refuses the connection.
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    out = deliver(client, endpoint=f"http://127.0.0.1:{port}/hook", headers=[], content_type=MIME, body=BODY,
                  timeout_s=2.0)
    assert (out.ok, out.error, out.retryable) == (False, "connect", True)


def test_broken_exchange_retryable(router: respx.MockRouter, client: httpx.Client) -> None:
    router.post(HOOK).mock(side_effect=httpx.RemoteProtocolError("peer closed connection"))
    out = send(client)
    assert (out.error, out.retryable) == ("transport", True)


def test_redirect_not_followed(router: respx.MockRouter, client: httpx.Client) -> None:
    moved = httpx.Response(307, headers={"Location": "https://elsewhere.example/x"})
    router.post(HOOK).mock(return_value=moved)
    elsewhere = router.post("https://elsewhere.example/x").mock(return_value=httpx.Response(200))
    out = send(client)
    assert (out.ok, out.status, out.error, out.retryable) == (False, 307, "http-3xx", False)
    assert not elsewhere.called  # the credentials never went to the redirect's host


@pytest.mark.parametrize("header", ["no colon here", "Bad Name: x", "X-A: 1\r\nX-B: 2",
                                    "Content-Type: text/plain"])
def test_invalid_header_sends_nothing(router: respx.MockRouter, client: httpx.Client, header: str) -> None:
    route = router.post(HOOK).mock(return_value=httpx.Response(200))
    out = send(client, ["X-Ok: 1", header])
    assert (out.ok, out.status, out.error, out.retryable) == (False, None, "invalid-header", False)
    assert not route.called


def test_nothing_secret_is_logged_or_kept(router: respx.MockRouter, client: httpx.Client,
                                          caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.DEBUG)
    router.post(HOOK).mock(return_value=httpx.Response(500))
    out = send(client)
    assert SECRET not in caplog.text and BODY.decode() not in caplog.text
    assert SECRET not in repr(out) and "resourceType" not in repr(out)


@pytest.mark.parametrize("endpoint", ["ftp://pager.example.org/hook", "https://pager.example.org:port/x",
                                      "https:///hook"])
def test_unusable_endpoint_not_retryable(client: httpx.Client, endpoint: str) -> None:
    out = deliver(client, endpoint=endpoint, headers=[], content_type=MIME, body=BODY, timeout_s=1.0)
    assert (out.ok, out.status, out.error, out.retryable) == (False, None, "invalid-endpoint", False)


def test_non_positive_timeout_is_a_programming_error(client: httpx.Client) -> None:
    with pytest.raises(ValueError):
        deliver(client, endpoint=HOOK, headers=[], content_type=MIME, body=BODY, timeout_s=0)
