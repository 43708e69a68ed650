"""FHIR on the wire at the API edge: read a JSON body within limits, answer with FHIR JSON."""

from __future__ import annotations

from typing import Any

import orjson
from fastapi import Request
from fastapi.responses import Response

from service.config import Settings
from service.errors import Issue, RequestRejected
from service.fhir.limits import json_value_count, overlong_strings_outside_entries
from service.fhir.render import FHIR_JSON, operation_outcome

__all__ = ["fhir_response", "outcome_response", "prefer_return", "read_json"]

_JSON_TYPES = ("application/fhir+json", "application/json", "application/json+fhir")
_MAX_DEPTH = 254  # orjson's serialisation limit


async def read_json(request: Request, *, max_bytes: int) -> tuple[Any, bytes]:
    """The parsed body and its exact bytes; RequestRejected with 413/415/400 as deserved."""
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype not in _JSON_TYPES:
        raise RequestRejected([Issue("not-supported", f"Content-Type {ctype or '(none)'!r} is not supported; "
                                     "send application/fhir+json", status=415)])
    declared = request.headers.get("content-length")
    if declared and declared.isdigit() and int(declared) > max_bytes:
        raise _too_large(int(declared), max_bytes)
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > max_bytes:
            raise _too_large(size, max_bytes)
        chunks.append(chunk)
    raw = b"".join(chunks)
    chunks.clear()  # one copy of the body, not two, while it is parsed
    settings: Settings = request.app.state.ctx.settings
    # Before parsing: a body of many tiny values costs far more memory than its bytes suggest.
    values = json_value_count(raw, enough=settings.max_json_values)
    if values > settings.max_json_values:
        raise RequestRejected([Issue("too-costly", f"request body holds {values} JSON values (objects, arrays and "
                                     f"primitives); the limit is {settings.max_json_values}", status=413)])
    try:
        body = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise RequestRejected([Issue("structure", f"malformed JSON: {exc}")]) from exc
    try:
        # The parser takes 1024 levels, the serialiser (used on every entry later) only 254: refuse here
        # what would otherwise fail deep inside. A fraction of the cost of the parse.
        orjson.dumps(body)
    except TypeError as exc:
        raise RequestRejected([Issue("structure", f"JSON is nested more than {_MAX_DEPTH} levels deep")]) from exc
    # A string cannot have more characters than the body has bytes: small bodies need no walk.
    if len(raw) > settings.max_string_chars:
        rtype = body.get("resourceType") if isinstance(body, dict) else None
        root = rtype if isinstance(rtype, str) and rtype.isalpha() and len(rtype) <= 64 else "Resource"
        issues = overlong_strings_outside_entries(body, root, settings.max_string_chars)
        if issues:
            raise RequestRejected(issues)
    return body, raw


def _too_large(size: int, limit: int) -> RequestRejected:
    return RequestRejected([Issue("too-costly", f"request body of {size} bytes is over the limit of {limit} bytes",
                                  status=413)])


def prefer_return(request: Request, default: str) -> str:
    """``minimal``, ``representation`` or ``OperationOutcome`` from the Prefer header."""
    for part in request.headers.get("prefer", "").split(";"):
        key, _, value = part.strip().partition("=")
        if key.lower() == "return" and value.strip('"') in ("minimal", "representation", "OperationOutcome"):
            return value.strip('"')
    return default


def fhir_response(body: dict[str, Any] | bytes | None, status: int = 200,
                  headers: dict[str, str] | None = None) -> Response:
    content = body if isinstance(body, bytes) or body is None else orjson.dumps(body)
    return Response(content=content or b"", status_code=status, media_type=FHIR_JSON if content else None,
                    headers=headers)


def outcome_response(issues: list[Issue], status: int) -> Response:
    return fhir_response(operation_outcome(issues), status)
