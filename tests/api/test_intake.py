"""The body intake in front of the routes: how many bodies at once, how long a body may take.

Run on a small Starlette app of its own, so what is observed is the intake alone; the drills in
tests/test_intake_drills.py run the same against a real `lytestream serve` over a raw socket.
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator

import httpx
import orjson
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import Response
from starlette.routing import Route

from service.api.intake import BodyIntake
from service.errors import RequestRejected


def recording_app(pause_s: float) -> tuple[Starlette, dict[str, int]]:
    """An app that reads the body, then works a while; it records how many requests were inside at once."""
    seen = {"inside": 0, "most": 0, "done": 0}

    async def endpoint(request: Request) -> Response:
        await request.body()
        seen["inside"] += 1
        seen["most"] = max(seen["most"], seen["inside"])
        await asyncio.sleep(pause_s)
        seen["inside"] -= 1
        seen["done"] += 1
        return Response(b"ok")

    async def rejected(request: Request, exc: Exception) -> Response:
        assert isinstance(exc, RequestRejected)
        return Response(orjson.dumps([i.message for i in exc.issues]), status_code=exc.status)

    return Starlette(routes=[Route("/", endpoint, methods=["POST"])],
                     exception_handlers={RequestRejected: rejected}), seen


async def post_all(app: BodyIntake, bodies: list[bytes | AsyncIterator[bytes]]) -> list[httpx.Response]:
    async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://intake") as client:
        return list(await asyncio.gather(*[client.post("/", content=b) for b in bodies]))


def test_no_more_bodies_than_the_slots_are_processed_at_once() -> None:
    inner, seen = recording_app(pause_s=0.05)
    app = BodyIntake(inner, max_body_bytes=1000, timeout_s=5, slots=2)
    responses = asyncio.run(post_all(app, [b"x" * 100] * 6))
    assert [r.status_code for r in responses] == [200] * 6
    assert seen["most"] == 2
    assert seen["done"] == 6


def test_a_body_that_stops_arriving_is_answered_408() -> None:
    async def stalls() -> AsyncIterator[bytes]:
        yield b'{"resourceType": '
        await asyncio.sleep(2)
        yield b'"Bundle"}'

    inner, seen = recording_app(pause_s=0)
    app = BodyIntake(inner, max_body_bytes=1000, timeout_s=0.2, slots=2)
    (response,) = asyncio.run(post_all(app, [stalls()]))
    assert response.status_code == 408
    assert "0.2 s" in response.json()[0]
    assert seen["done"] == 0


def test_the_timeout_runs_from_the_first_read_not_from_the_wait_for_a_slot() -> None:
    inner, seen = recording_app(pause_s=0.3)
    app = BodyIntake(inner, max_body_bytes=1000, timeout_s=0.2, slots=1)
    responses = asyncio.run(post_all(app, [b"x"] * 3))  # the third waits 0.6 s for its slot
    assert [r.status_code for r in responses] == [200] * 3


def test_a_slot_is_given_back_when_the_body_is_refused() -> None:
    inner, seen = recording_app(pause_s=0)
    app = BodyIntake(inner, max_body_bytes=10, timeout_s=5, slots=1)
    responses = asyncio.run(post_all(app, [b"x" * 11, b"x" * 11, b"x"]))
    assert [r.status_code for r in responses] == [413, 413, 200]
