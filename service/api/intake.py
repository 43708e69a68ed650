"""What reading a request body may cost a worker: bytes, time, and how many bodies at once.

An ASGI middleware in front of every route. Each request body is counted as it streams in and
refused at the first byte over ``max_body_bytes`` (413), whatever its Content-Length said; the
whole body must arrive within ``timeout_s`` of the first read (408), so a stalled upload cannot
hold a worker; and at most ``slots`` requests per worker read and process a body at once, the
others waiting their turn before their first byte is read. Parsing, validating and storing a body
costs a multiple of its size; the slots are what keeps a worker's memory within a stated budget
under concurrent large requests (``bench/memory_drill.py`` measures it).

A slot is taken when the route first reads the body (after authentication, so a caller without
a token never holds one) and given back when the response has been sent. A client that goes away
mid-body raises :class:`BodyAborted`, which the app logs as one line.
"""

from __future__ import annotations

import asyncio

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.errors import Issue, RequestRejected, ServiceError

__all__ = ["BodyAborted", "BodyIntake"]

_WITH_BODY = frozenset({"POST", "PUT", "PATCH"})


class BodyAborted(ServiceError):
    """The client disconnected before its request body was complete; nothing was processed."""

    def __init__(self, received: int) -> None:
        super().__init__(f"client disconnected after {received} body bytes")
        self.received = received


class BodyIntake:
    def __init__(self, app: ASGIApp, *, max_body_bytes: int, timeout_s: float, slots: int) -> None:
        self.app = app
        self.max_body_bytes = max_body_bytes
        self.timeout_s = timeout_s
        self._slot_count = slots
        self._slots: tuple[asyncio.AbstractEventLoop, asyncio.Semaphore] | None = None

    def slots(self) -> asyncio.Semaphore:
        """The semaphore of the running loop (a server has one; test clients may start several)."""
        loop = asyncio.get_running_loop()
        if self._slots is None or self._slots[0] is not loop:
            self._slots = (loop, asyncio.Semaphore(self._slot_count))
        return self._slots[1]

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in _WITH_BODY:
            await self.app(scope, receive, send)
            return
        body = _Body(self, receive)
        try:
            await self.app(scope, body.receive, send)
        finally:
            body.release()


class _Body:
    """One request's body as the route reads it: counted, timed, and holding a slot once read."""

    def __init__(self, intake: BodyIntake, receive: Receive) -> None:
        self.intake = intake
        self.slots = intake.slots()
        self._receive = receive
        self.admitted = False
        self.complete = False
        self.received = 0
        self.deadline = 0.0

    async def receive(self) -> Message:
        if self.complete:
            return await self._receive()  # after the body: e.g. a response listening for disconnect
        loop = asyncio.get_running_loop()
        if not self.admitted:
            await self.slots.acquire()
            self.admitted = True
            self.deadline = loop.time() + self.intake.timeout_s
        try:
            async with asyncio.timeout_at(self.deadline):
                message = await self._receive()
        except TimeoutError:
            raise RequestRejected([Issue(
                "timeout", f"the request body did not arrive within {self.intake.timeout_s:g} s "
                f"({self.received} bytes received); nothing was stored", status=408)]) from None
        if message["type"] == "http.disconnect":
            raise BodyAborted(self.received)
        if message["type"] == "http.request":
            self.received += len(message.get("body", b""))
            if self.received > self.intake.max_body_bytes:
                raise RequestRejected([Issue(
                    "too-costly", f"request body is over the limit of {self.intake.max_body_bytes} bytes",
                    status=413)])
            self.complete = not message.get("more_body", False)
        return message

    def release(self) -> None:
        if self.admitted:
            self.admitted = False
            self.slots.release()
