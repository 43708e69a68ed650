"""A JSON object → a FHIR Parameters resource, parts for nested objects. Pure.

For answers whose content is figures (``$summary``): each key is a parameter name; a number is
``valueInteger`` or ``valueDecimal``, a string ``valueString`` (or the type named in ``typed``), an object a
parameter with parts. R4 Parameters inv-1 allows a value or parts, never neither, so a null or an empty
object is left out: absent means "none".
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

__all__ = ["as_parameters"]


def _parameter(name: str, value: Any, typed: Mapping[str, str]) -> dict[str, Any] | None:
    if value is None:
        return None
    if isinstance(value, Mapping):
        parts = [p for k, v in value.items() if (p := _parameter(str(k), v, typed)) is not None]
        return {"name": name, "part": parts} if parts else None
    if isinstance(value, bool):
        return {"name": name, "valueBoolean": value}
    if isinstance(value, int):
        return {"name": name, "valueInteger": value}
    if isinstance(value, float):
        return {"name": name, "valueDecimal": value}
    return {"name": name, typed.get(name, "valueString"): str(value)}


def as_parameters(content: Mapping[str, Any], typed: Mapping[str, str] | None = None) -> dict[str, Any]:
    params = [p for k, v in content.items() if (p := _parameter(k, v, typed or {})) is not None]
    return {"resourceType": "Parameters", "parameter": params}
