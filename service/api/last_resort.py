"""The last resort: an exception nothing else handled still answers a FHIR OperationOutcome (500).

Starlette's own catch-all answers and then raises the exception on to the server, and a server that
sees an application raise after answering closes the connection (uvicorn does), so every client on a
kept-alive connection would pay for one fault. This middleware, outside all others, answers and does
not raise. Input never gets here (tests/test_wire_property.py): a 500 is a server fault only.
"""

from __future__ import annotations

import logging

from starlette.responses import Response
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.api.fhir_io import outcome_response
from service.errors import Issue
from service.logsafe import describe, safe_traceback

__all__ = ["LastResort", "internal_error"]

log = logging.getLogger("lytestream")


def internal_error() -> Response:
    # Not "nothing was stored": the fault may come after the unit of work committed. A resend is
    # harmless either way (an identical resend changes nothing).
    return outcome_response([Issue("exception", "internal error; send the request again (an identical resend "
                                   "changes nothing if it was stored)", severity="fatal")], 500)


class LastResort:
    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def watch(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, receive, watch)
        except Exception as exc:
            # No PHI: the type and the frames, never the message (service.logsafe).
            log.error("unhandled %s\n%s", describe(exc), safe_traceback(exc))
            if started:
                raise  # half an answer is on the wire: only closing the connection ends it cleanly
            await internal_error()(scope, receive, send)
