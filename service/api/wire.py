"""FHIR at the edge of the wire: the base with or without its trailing slash, and JSON as the one format.

An ASGI middleware in front of the routes. ``POST [base]/`` is ``POST [base]`` (answered in place: a client
need not follow a redirect of a POST). A request under the base that accepts no JSON FHIR type, by ``Accept``
or ``_format``, is answered 406 Not Acceptable (R4 http.html#mime): this server speaks JSON only.
"""

from __future__ import annotations

from urllib.parse import parse_qsl

from starlette.types import ASGIApp, Receive, Scope, Send

from service.api.fhir_io import outcome_response
from service.errors import Issue

__all__ = ["FhirWire", "acceptable"]

_JSON = frozenset({"application/fhir+json", "application/json", "application/json+fhir", "application/*", "*/*",
                   "json"})
_XML = frozenset({"xml", "text/xml", "application/xml", "application/fhir+xml", "application/xml+fhir"})


def acceptable(accept: str | None, fmt: str | None) -> bool:
    """Whether a JSON answer satisfies the ``Accept`` header and the ``_format`` parameter."""
    # A "+" in a query string reads as a space: application/fhir+xml arrives as "application/fhir xml".
    if fmt is not None and fmt.split(";")[0].strip().lower().replace(" ", "+") in _XML:
        return False
    if not accept or not accept.strip():
        return True
    for item in accept.split(","):
        media, *params = (p.strip() for p in item.split(";"))
        q = 1.0
        for p in params:
            key, _, value = p.partition("=")
            if key.strip().lower() == "q":
                try:
                    q = float(value)
                except ValueError:
                    q = 0.0
        if media.lower() in _JSON and q > 0:
            return True
    return False


class FhirWire:
    def __init__(self, app: ASGIApp, *, base_path: str) -> None:
        self.app = app
        self.base_path = base_path.rstrip("/")

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http":
            path: str = scope["path"]
            if path == self.base_path + "/":
                scope = {**scope, "path": self.base_path, "raw_path": self.base_path.encode()}
            elif path == self.base_path or path.startswith(self.base_path + "/"):
                headers = dict(scope.get("headers") or [])
                accept = headers.get(b"accept", b"").decode("latin-1")
                fmt = dict(parse_qsl(scope.get("query_string", b"").decode("latin-1"))).get("_format")
                if not acceptable(accept, fmt):
                    response = outcome_response([Issue("not-supported", "this server answers in JSON only: "
                                                       "accept application/fhir+json", status=406)], 406)
                    await response(scope, receive, send)
                    return
        await self.app(scope, receive, send)
