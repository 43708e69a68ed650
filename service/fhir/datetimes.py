"""Date-times without a UTC offset: refused with their FHIRPath, or read in the lab's zone.

FHIR requires an offset whenever a time is given. Some interface engines drop it; a deployment that
knows its lab clock's IANA zone may name it, and such values are then accepted with a warning.
"""

from __future__ import annotations

import re
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

from service.errors import Issue

__all__ = ["OFFSETLESS_JSON", "fix_offsetless"]

_NO_OFFSET = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(:\d{2}(\.\d+)?)?$")
# The same, as a JSON string anywhere in serialised bytes: when it finds nothing, nothing needs walking.
OFFSETLESS_JSON = re.compile(rb'"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(:\d{2}(\.\d+)?)?"')


def fix_offsetless(resource: dict[str, Any], root: str, zone: str | None) -> list[Issue]:
    """Find offset-less date-times in ``resource``; rewrite them in place when ``zone`` is set.

    Returns errors (no zone) or warnings (rewritten), each with the element's FHIRPath.
    """
    issues: list[Issue] = []
    tz = ZoneInfo(zone) if zone else None

    def visit(node: Any, path: str) -> None:
        if isinstance(node, dict):
            for key, value in node.items():
                if isinstance(value, str):
                    if _NO_OFFSET.match(value):
                        issues.append(_handle(node, key, value, f"{path}.{key}", tz, zone))
                elif isinstance(value, (dict, list)):
                    visit(value, f"{path}.{key}")
        elif isinstance(node, list):
            for i, item in enumerate(node):
                if isinstance(item, str):
                    if _NO_OFFSET.match(item):
                        issues.append(_handle(node, i, item, f"{path}[{i}]", tz, zone))
                else:
                    visit(item, f"{path}[{i}]")

    visit(resource, root)
    return issues


def _handle(
    parent: Any, key: Any, value: str, path: str, tz: ZoneInfo | None, zone: str | None
) -> Issue:
    if tz is None:
        return Issue(
            "value",
            f"date-time {value!r} has a time but no UTC offset; FHIR requires one "
            "(or the deployment must name its lab time zone)",
            (path,),
        )
    text = value if value.count(":") == 2 else value + ":00"
    local = datetime.fromisoformat(text).replace(tzinfo=tz)
    parent[key] = local.isoformat()
    return Issue(
        "value",
        f"date-time {value!r} had no UTC offset; read in the lab time zone {zone} as {parent[key]}",
        (path,),
        severity="warning",
    )
