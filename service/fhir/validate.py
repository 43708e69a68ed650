"""Structural validation with the fhir.resources R4B models, errors mapped to FHIRPath issues."""

from __future__ import annotations

import os
import re
import threading
from collections import OrderedDict
from functools import lru_cache
from typing import Any

import orjson
from fhir.resources.R4B import get_fhir_model_class
from pydantic import ValidationError

from service.errors import Issue
from service.fhir.fhirpath import step
from service.fhir.wire_types import wire_type_issues

__all__ = ["full_validation", "validate_resource"]


@lru_cache(maxsize=64)
def _model(resource_type: str) -> Any:
    return get_fhir_model_class(resource_type)


# Elements a lab repeats verbatim across thousands of results. Validating an element is context-free
# in the R4B models (resource-level checks are only required elements and value[x]-style choices,
# none of which is listed here), so once a combination of them has passed as part of a whole
# Observation, later Observations carrying the same combination need only the rest validated, with
# a stand-in code to keep the required element present. Same issues as a full validation, a
# property test says; about twice as fast on a lab feed.
_REPEATED = ("category", "code", "performer", "referenceRange", "interpretation", "method", "device")
_STAND_IN_CODE = {"text": "validated"}
_known_good: OrderedDict[bytes, None] = OrderedDict()
_KNOWN_GOOD_MAX = 4096
_lock = threading.Lock()


def validate_resource(resource: dict[str, Any], root: str) -> list[Issue]:
    """Issues found by the R4B model for this resource; empty when it is well formed.

    ``root`` is the FHIRPath of the resource itself (``Observation`` or ``Bundle.entry[2].resource``).
    """
    resource_type = resource.get("resourceType")
    try:
        model = _model(str(resource_type))
    except (KeyError, ValueError):
        return [Issue("not-supported", f"unknown resourceType {resource_type!r}", (f"{root}.resourceType",))]
    if resource_type == "Observation":
        key = orjson.dumps([resource.get(k) for k in _REPEATED])
        if key in _known_good:
            rest = {k: v for k, v in resource.items() if k not in _REPEATED}
            rest["code"] = _STAND_IN_CODE
            return _run(model, rest, root)
        issues = _run(model, resource, root)
        if not issues:
            with _lock:
                _known_good[key] = None
                if len(_known_good) > _KNOWN_GOOD_MAX:
                    _known_good.popitem(last=False)
        return issues
    return _run(model, resource, root)


def full_validation(resource: dict[str, Any], root: str) -> list[Issue]:
    """The same check without the shortcut: what the shortcut is tested against."""
    resource_type = resource.get("resourceType")
    try:
        model = _model(str(resource_type))
    except (KeyError, ValueError):
        return [Issue("not-supported", f"unknown resourceType {resource_type!r}", (f"{root}.resourceType",))]
    return _run(model, resource, root)


def _run(model: Any, resource: dict[str, Any], root: str) -> list[Issue]:
    try:
        model.model_validate(resource)
    except ValidationError as exc:
        return [_issue(err, root, resource) for err in exc.errors(include_url=False)]
    except RecursionError:
        # Elements nested a hundred deep (extensions in extensions) exhaust the models' stack.
        return [Issue("structure", "elements are nested too deeply to validate", (root,))]
    except (KeyError, TypeError, AttributeError, ValueError):
        # The models fail outright on some inputs (a contained resource of an unknown type raises KeyError).
        return _unreadable_contained(resource, root) or [
            Issue("structure", "the R4B models cannot read this resource", (root,))]
    # What the models coerce rather than refuse ("140" for a decimal) or leave unchecked (comparator).
    return wire_type_issues(resource, model, root)


def _unreadable_contained(resource: dict[str, Any], root: str) -> list[Issue]:
    contained = resource.get("contained")
    issues: list[Issue] = []
    for i, item in enumerate(contained if isinstance(contained, list) else ()):
        rtype = item.get("resourceType") if isinstance(item, dict) else None
        try:
            _model(str(rtype))
        except (KeyError, ValueError):
            issues.append(Issue("not-supported", f"unknown resourceType {rtype!r}",
                                (f"{root}.contained[{i}].resourceType",)))
    return issues


def _issue(err: Any, root: str, resource: dict[str, Any]) -> Issue:
    kind = err.get("type", "")
    path, node = _located(err.get("loc", ()), root, resource, missing="missing" in kind)
    code = "required" if "missing" in kind else "structure" if kind == "extra_forbidden" else "value"
    message = str(err.get("msg", "invalid")).removeprefix("Value error, ")
    if "but got multiple" in message:
        # A choice type sent twice: name each variant sent (value[x] is not FHIRPath; valueString is).
        names = re.findall(r"'([a-zA-Z]+)'", message)
        stem = os.path.commonprefix(names)
        stem = re.sub(r"[A-Z][a-z]*$", "", stem) if names and len(names) > 1 else stem
        sent = [n for n in names if isinstance(node, dict) and node.get(n) is not None]
        if stem and sent:
            return Issue(code, f"only one {stem}[x] may be given, not {' and '.join(sent)}",
                         tuple(step(path, n) for n in sent))
    if "Expect any of field value from this list" in message:
        # A required choice sent in none of its variants: FHIRPath names it without [x] (effective).
        stem = re.sub(r"[A-Z][a-z]*$", "", os.path.commonprefix(re.findall(r"'([a-zA-Z]+)'", message)))
        if stem:
            return Issue("required", f"{stem}[x] is required", (step(path, stem),))
    if kind == "extra_forbidden":
        message = "element is not part of FHIR R4 for this resource"
    return Issue(code, message, (path,))


def _located(loc: Any, root: str, resource: dict[str, Any], *, missing: bool) -> tuple[str, Any]:
    """The FHIRPath of the element an error's ``loc`` names, and that element's JSON.

    ``loc`` mixes element names with the models' own steps (``root`` of a wrapped value, validator
    names): only the steps found in the JSON sent are kept, and the last step of a missing element.
    """
    path: str = root
    node: Any = resource
    parts = list(loc)
    for n, part in enumerate(parts):
        name = "resourceType" if part == "resource_type" else part
        if isinstance(name, int) and isinstance(node, list) and 0 <= name < len(node):
            path, node = f"{path}[{name}]", node[name]
        elif isinstance(name, str) and isinstance(node, dict) and name in node:
            path, node = step(path, name), node[name]
        elif missing and n == len(parts) - 1 and isinstance(name, str):
            path, node = step(path, name), None
    return path, node
