"""Size limits on what a client sends, checked before the costly steps (parsing, validation, storing).

Pure: bytes or parsed JSON in, Issues and counts out. Nothing here echoes the content it measures,
which may be a patient identifier.
"""

from __future__ import annotations

import re
from typing import Any

from service.errors import Issue

__all__ = ["json_value_count", "overlong_strings", "overlong_strings_outside_entries"]

# A JSON string, escapes included; possessive, so a megabyte-long string costs one linear scan.
_JSON_STRING = re.compile(rb'"[^"\\]*+(?:\\.[^"\\]*+)*+"')


def json_value_count(raw: bytes, *, enough: int) -> int:
    """How many JSON values (objects, arrays and primitives) ``raw`` holds, without parsing it.

    Every value but the first in a container follows a comma, so outside strings
    ``1 + commas + containers`` is exact but for counting an empty object or array twice (FHIR
    allows neither). The raw count with strings left in is never lower; when that is within
    ``enough`` the scan that blanks out strings is skipped.
    """
    rough = raw.count(b",") + raw.count(b"{") + raw.count(b"[") + 1
    if rough <= enough:
        return rough
    bare = _JSON_STRING.sub(b'""', raw)
    return bare.count(b",") + bare.count(b"{") + bare.count(b"[") + 1


def overlong_strings(node: Any, root: str, limit: int) -> list[Issue]:
    """A 422 ``too-long`` issue for each string value or element name over ``limit`` characters.

    Walks with its own stack: nesting as deep as the JSON parser allows cannot exhaust Python's.
    """
    issues: list[Issue] = []
    stack: list[tuple[Any, str]] = [(node, root)]
    while stack:
        item, path = stack.pop()
        if isinstance(item, dict):
            for key, value in item.items():
                if len(key) > limit:
                    issues.append(_too_long("element name", len(key), limit, path))
                    continue
                stack.append((value, f"{path}.{key}"))
        elif isinstance(item, list):
            stack.extend((value, f"{path}[{i}]") for i, value in enumerate(item))
        elif isinstance(item, str) and len(item) > limit:
            issues.append(_too_long("string", len(item), limit, path))
    return sorted(issues, key=lambda i: i.expression)


def overlong_strings_outside_entries(body: Any, root: str, limit: int) -> list[Issue]:
    """The same for a request body, leaving out each Bundle entry's resource (checked as an entry)."""
    entries = body.get("entry") if isinstance(body, dict) and body.get("resourceType") == "Bundle" else None
    if isinstance(entries, list):
        envelope = [{k: v for k, v in e.items() if k != "resource"} if isinstance(e, dict) else e for e in entries]
        body = {**body, "entry": envelope}
    return overlong_strings(body, root, limit)


def _too_long(what: str, size: int, limit: int, path: str) -> Issue:
    return Issue("too-long", f"{what} of {size} characters is over the limit of {limit} characters "
                 "(FHIR R4 strings must not exceed 1 MB)", (path,), status=422)
