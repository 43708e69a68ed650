"""Unauthenticated, like the CapabilityStatement: the conformance resources its canonicals name."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import Response

from service.api.fhir_io import fhir_response
from service.errors import NotFound
from service.fhir.conformance import CONFORMANCE_TYPES, conformance_resource

router = APIRouter()


def _read(rtype: str, rid: str) -> Response:
    body = conformance_resource(rtype, rid)
    if body is None:
        raise NotFound(f"{rtype}/{rid} is not defined here")
    return fhir_response(body)


def _route(rtype: str) -> None:
    @router.get(f"/fhir/{rtype}/{{rid}}", name=f"read {rtype}")
    def read(rid: str) -> Response:
        return _read(rtype, rid)


for _type in CONFORMANCE_TYPES:
    _route(_type)
