"""Who is asking: the request id (X-Request-Id, echoed back) and the client the credential names."""

from __future__ import annotations

import uuid
from typing import Annotated

from fastapi import Depends, Request

from service.auth.deps import CallerDep
from service.fhir.audit_render import Requester

__all__ = ["RequesterDep", "request_id"]

ANONYMOUS = "anonymous"


def request_id(request: Request) -> str:
    rid: str | None = getattr(request.state, "request_id", None)
    if rid is None:
        given = request.headers.get("x-request-id", "")
        # A sender's id is kept when it is sane; it appears in logs and AuditEvents.
        rid = given if 0 < len(given) <= 64 and given.replace("-", "").isalnum() else str(uuid.uuid4())
        request.state.request_id = rid
    return rid


def _requester(request: Request, principal: CallerDep) -> Requester:
    """The authenticated caller (every route that names a requester is authenticated through it)."""
    client = principal.client_id or ANONYMOUS
    address = request.client.host if request.client else None
    return Requester(client=client, address=address, request_id=request_id(request), principal=principal)


RequesterDep = Annotated[Requester, Depends(_requester)]
