"""Structural validation with the fhir.resources R4B models, errors mapped to FHIRPath issues."""

from __future__ import annotations

import os
import re
from functools import lru_cache
from typing import Any

from fhir.resources.R4B import get_fhir_model_class
from pydantic import ValidationError

from service.errors import Issue

__all__ = ["validate_resource"]


@lru_cache(maxsize=64)
def _model(resource_type: str) -> Any:
    return get_fhir_model_class(resource_type)


def validate_resource(resource: dict[str, Any], root: str) -> list[Issue]:
    """Issues found by the R4B model for this resource; empty when it is well formed.

    ``root`` is the FHIRPath of the resource itself (``Observation`` or ``Bundle.entry[2].resource``).
    """
    resource_type = resource.get("resourceType")
    try:
        model = _model(str(resource_type))
    except (KeyError, ValueError):
        return [Issue("not-supported", f"unknown resourceType {resource_type!r}", (f"{root}.resourceType",))]
    try:
        model.model_validate(resource)
    except ValidationError as exc:
        return [_issue(err, root) for err in exc.errors(include_url=False)]
    return []


def _issue(err: Any, root: str) -> Issue:
    path = root
    for part in err.get("loc", ()):
        if isinstance(part, int):
            path += f"[{part}]"
        elif part == "resource_type":
            path += ".resourceType"
        else:
            path += f".{part}"
    kind = err.get("type", "")
    code = "required" if "missing" in kind else "structure" if kind == "extra_forbidden" else "value"
    message = str(err.get("msg", "invalid")).removeprefix("Value error, ")
    if "but got multiple" in message:
        # A choice type sent twice: name the element, e.g. value[x], from the listed variants.
        names = re.findall(r"'([a-zA-Z]+)'", message)
        stem = os.path.commonprefix(names)
        stem = re.sub(r"[A-Z][a-z]*$", "", stem) if names and len(names) > 1 else stem
        path = f"{path}.{stem}[x]" if stem else path
        message = f"only one {stem}[x] may be given" if stem else message
    if kind == "extra_forbidden":
        message = "element is not part of FHIR R4 for this resource"
    return Issue(code, message, (path,))
