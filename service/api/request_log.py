"""ASGI middleware: one JSON log line and one latency observation per request, and the request id.

The line names the route template (``/fhir/Observation/{rid}``), never the raw path or query: both can
carry an identifier (``?identifier=…|MRN``, ``?patient=…``). It carries the request id (the sender's
``X-Request-ID`` when sane, else a new one, echoed back either way), the method, the status, the
duration, the client id of the credential and, for ingest, counts of entries and results by outcome.
"""

from __future__ import annotations

import logging
import time
import uuid
from typing import Any

from fastapi import Request
from starlette.datastructures import MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.ops.metrics import REQUEST_SECONDS

__all__ = ["RequestLog", "note_route", "sane_request_id"]

log = logging.getLogger("lytestream.request")


def sane_request_id(given: str) -> str | None:
    """A sender's request id, kept when it is short and plain (it goes into logs and AuditEvents)."""
    return given if 0 < len(given) <= 64 and given.replace("-", "").replace(".", "").replace("_", "").isalnum() \
        else None


def note_route(request: Request) -> None:
    """An app-wide dependency: the matched route's template, for the log line and the latency label."""
    route = request.scope.get("route")
    request.state.route = getattr(route, "path", None)


class RequestLog:
    """``mounts``: path prefixes of mounted apps (the board's static files), named by their prefix, since no
    route template is noted for them."""

    def __init__(self, app: ASGIApp, mounts: tuple[str, ...] = ()) -> None:
        self.app = app
        self.mounts = tuple(m.rstrip("/") + "/" for m in mounts)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        # Shared with everything inside (request.state), even where a middleware copies the scope.
        state: dict[str, Any] = scope.setdefault("state", {})
        given = next((v.decode("latin-1") for k, v in scope.get("headers", ()) if k == b"x-request-id"), "")
        rid = sane_request_id(given) or str(uuid.uuid4())
        state["request_id"] = rid
        status = 500  # what the server answers when nothing inside sent a response

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
                MutableHeaders(scope=message)["X-Request-ID"] = rid
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            elapsed = time.perf_counter() - started
            route = state.get("route") or self._mount(scope["path"]) or "unmatched"
            REQUEST_SECONDS.labels(scope["method"], route, f"{status // 100}xx").observe(elapsed)
            principal = state.get("principal")
            line: dict[str, Any] = {"request_id": rid, "method": scope["method"], "route": route, "status": status,
                                    "duration_ms": round(elapsed * 1000, 1),
                                    "client": getattr(principal, "client_id", None)}
            for key in ("entries", "results"):
                if key in state:
                    line[key] = state[key]
            log.log(logging.WARNING if status >= 500 else logging.INFO, "request", extra=line)

    def _mount(self, path: str) -> str | None:
        return next((m.rstrip("/") for m in self.mounts if path.startswith(m)), None)
