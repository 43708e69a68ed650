"""What the R4B models coerce: JSON types of primitives, and the required bindings lytestream reads.

FHIR R4 JSON (https://hl7.org/fhir/R4/json.html#primitive) carries decimal, integer, unsignedInt and
positiveInt as JSON numbers, boolean as a JSON boolean and every other primitive as a JSON string. The
models accept ``"140"`` for a decimal, ``"true"`` for a boolean and a number for a dateTime, and would
have lytestream read them and serve them back as sent (invalid R4); so each element is checked here
against the type its model declares. Required bindings the models leave unchecked and the rules read
are checked here too (Quantity.comparator); statuses are checked where they are read (normalise.py).

Pure: a validated resource dict in, Issues with the FHIRPath of each offending element out.
"""

from __future__ import annotations

import decimal
import importlib
import types
import typing
from datetime import date, datetime, time
from functools import lru_cache
from typing import Any, Literal

from fhir.resources.R4B import get_fhir_model_class

from service.errors import Issue
from service.fhir.fhirpath import step

__all__ = ["wire_type_issues"]

Kind = Literal["number", "boolean", "string", "complex", "resource"]

# https://hl7.org/fhir/R4/valueset-quantity-comparator.html (required on Quantity and its profiles).
_COMPARATORS = ("<", "<=", ">=", ">")


def wire_type_issues(resource: dict[str, Any], model: Any, root: str) -> list[Issue]:
    """An Issue for each element whose JSON type or bound code is not what FHIR R4 says."""
    issues: list[Issue] = []
    stack: list[tuple[Any, Any, str]] = [(resource, model, root)]
    while stack:
        node, klass, path = stack.pop()
        fields = _fields(klass)
        quantity = _is_quantity(klass)
        for key, value in node.items():
            spec = fields.get(key)
            if spec is None or value is None:
                continue  # not an element the model knows (it said so already), or a primitive's extension
            kind, child = spec
            here = step(path, key)
            items = enumerate(value) if isinstance(value, list) else [(None, value)]
            for i, item in items:
                at = here if i is None else f"{here}[{i}]"
                if kind == "complex" and isinstance(item, dict):
                    stack.append((item, child, at))
                elif kind == "resource" and isinstance(item, dict):
                    contained = _resource_model(item.get("resourceType"))
                    if contained is not None:
                        stack.append((item, contained, at))
                elif kind not in ("complex", "resource"):
                    wrong = _wrong_json_type(kind, item)
                    if wrong:
                        issues.append(Issue("value", f"{key} must be a JSON {kind}{wrong}", (at,)))
                    elif quantity and key == "comparator" and item not in _COMPARATORS:
                        issues.append(Issue("code-invalid", f"Quantity.comparator {item!r} is not in the required "
                                            f"value set ({', '.join(_COMPARATORS)})", (at,)))
    return sorted(issues, key=lambda i: i.expression)


def _wrong_json_type(kind: Kind, value: Any) -> str:
    """Empty when ``value`` has the JSON type ``kind`` asks for; else what it was, in words."""
    # Per primitive on the ingest path: the common case (a string) answers first, with no dict built.
    if kind == "string":
        ok = isinstance(value, str)
    elif kind == "number":
        ok = isinstance(value, int | float) and not isinstance(value, bool)
    else:
        ok = isinstance(value, bool)
    if ok:
        return ""
    got = ("boolean" if isinstance(value, bool) else "number" if isinstance(value, int | float)
           else "string" if isinstance(value, str) else "array" if isinstance(value, list) else "object")
    quoted = kind != "string" and got == "string"
    return f", not a JSON {got}" + (f" (FHIR R4 JSON: a {kind} is not quoted)" if quoted else "")


@lru_cache(maxsize=512)
def _fields(klass: Any) -> dict[str, tuple[Kind, Any]]:
    """JSON name → (kind, model of a complex element) for each element of ``klass``."""
    out: dict[str, tuple[Kind, Any]] = {}
    for info in klass.model_fields.values():
        extra = info.json_schema_extra or {}
        if not isinstance(extra, dict) or not extra.get("element_property"):
            continue  # fhir_comments, and the _element extensions of primitives
        found = _kind(info.annotation)
        if found is not None:
            out[str(info.alias)] = found
    return out


def _kind(annotation: Any) -> tuple[Kind, Any] | None:
    args = [a for a in typing.get_args(annotation) if a is not type(None)] if _is_union(annotation) else [annotation]
    if len(args) != 1:
        return None
    t = args[0]
    if typing.get_origin(t) is list:
        t = typing.get_args(t)[0]
    if typing.get_origin(t) is typing.Annotated:
        t = typing.get_args(t)[0]
    if t is bool:
        return "boolean", None
    if t in (int, decimal.Decimal):
        return "number", None
    if t in (str, datetime, date, time, bytes):
        return "string", None
    target = getattr(t, "_model_klass", None)
    if isinstance(target, str):
        module, _, name = target.rpartition(".")
        klass = getattr(importlib.import_module(module), name)
        return ("resource", None) if name in ("Resource", "DomainResource") else ("complex", klass)
    return None


def _is_union(annotation: Any) -> bool:
    return typing.get_origin(annotation) in (typing.Union, types.UnionType)


@lru_cache(maxsize=64)
def _resource_model(resource_type: Any) -> Any:
    try:
        return get_fhir_model_class(str(resource_type))
    except (KeyError, ValueError):
        return None


@lru_cache(maxsize=512)
def _is_quantity(klass: Any) -> bool:
    return issubclass(klass, get_fhir_model_class("Quantity"))
