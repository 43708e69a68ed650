"""Date-times without a UTC offset: refused with their FHIRPath, or read in the lab's zone.

FHIR requires an offset whenever a time is given. Some interface engines drop it; a deployment that
knows its lab clock's IANA zone may name it, and such values are then accepted with a warning.

Where the zone changes its clocks a wall time does not name one instant: in the autumn an hour
happens twice, in the spring an hour does not happen at all. Such a time is refused with the reason
(``on_transition="refuse"``, the default: a result may be an hour off either way, which moves rates
and rechecks), or read as PEP 495's ``fold=0`` does with a warning that says so (``"accept"``):
the first of two occurrences, or, in a gap, the offset in force before the change (the instant
the lab clock would have shown that time had it not yet been put forward).
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from typing import Any, Literal
from zoneinfo import ZoneInfo

from service.errors import Issue

__all__ = ["OFFSETLESS_JSON", "OnTransition", "fix_offsetless", "local_reading", "without_leap_second"]

OnTransition = Literal["refuse", "accept"]

_NO_OFFSET = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(:\d{2}(\.\d+)?)?$")
# The same, as a JSON string anywhere in serialised bytes: when it finds nothing, nothing needs walking.
OFFSETLESS_JSON = re.compile(rb'"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}(:\d{2}(\.\d+)?)?"')


# FHIR R4 datatypes (instant, dateTime: seconds "[0-5][0-9]|60") and RFC 3339 section 5.7 allow a leap
# second, 23:59:60; Python's datetime has no second 60. It is read as 23:59:59.999999, the last instant
# Python can name before the next second: it stays in its own minute and day, after every earlier time
# and before the next second, so ordering and windows treat it as the lab meant. The text is kept as sent.
_LEAP_SECOND = re.compile(r"^(\d{4}-\d{2}-\d{2}T\d{2}:\d{2}):60(?:\.\d+)?(.*)$")


def without_leap_second(value: str) -> str:
    """``value`` with a leap second (``:60``) read as ``:59.999999``; any other value unchanged."""
    m = _LEAP_SECOND.match(value)
    return f"{m[1]}:59.999999{m[2]}" if m else value


def fix_offsetless(resource: dict[str, Any], root: str, zone: str | None, *,
                   on_transition: OnTransition = "refuse") -> list[Issue]:
    """Find offset-less date-times in ``resource``; rewrite them in place when ``zone`` is set.

    Returns errors (no zone, an impossible date, or a time the zone's clock change leaves doubtful
    under ``refuse``) or warnings (rewritten), each with the element's FHIRPath.
    """
    issues: list[Issue] = []
    tz = ZoneInfo(zone) if zone else None

    def handle(parent: Any, key: Any, value: str, path: str) -> None:
        issue, rewritten = _handle(value, path, tz, on_transition)
        issues.append(issue)
        if rewritten is not None:
            parent[key] = rewritten

    def visit(node: Any, path: str) -> None:
        if isinstance(node, dict):
            for key, value in node.items():
                if isinstance(value, str):
                    if _NO_OFFSET.match(value):
                        handle(node, key, value, f"{path}.{key}")
                elif isinstance(value, (dict, list)):
                    visit(value, f"{path}.{key}")
        elif isinstance(node, list):
            for i, item in enumerate(node):
                if isinstance(item, str):
                    if _NO_OFFSET.match(item):
                        handle(node, i, item, f"{path}[{i}]")
                else:
                    visit(item, f"{path}[{i}]")

    visit(resource, root)
    return issues


def local_reading(wall: datetime, tz: ZoneInfo) -> tuple[datetime, Literal["single", "twice", "none"]]:
    """``wall`` (naive) read in ``tz`` as ``fold=0``, and how many instants that wall time names.

    Where the two folds give one offset the time is ordinary; where they differ it is either in an
    overlap (both readings come back to the same wall time) or in a gap (neither does).
    """
    first = wall.replace(tzinfo=tz, fold=0)
    if first.utcoffset() == wall.replace(tzinfo=tz, fold=1).utcoffset():
        return first, "single"
    back = first.astimezone(UTC).astimezone(tz).replace(tzinfo=None)
    return first, "twice" if back == wall else "none"


def _handle(value: str, path: str, tz: ZoneInfo | None, on_transition: OnTransition) -> tuple[Issue, str | None]:
    if tz is None:
        return Issue(
            "value",
            f"date-time {value!r} has a time but no UTC offset; FHIR requires one "
            "(or the deployment must name its lab time zone)",
            (path,),
        ), None
    text = value if value.count(":") == 2 else value + ":00"
    try:
        wall = datetime.fromisoformat(without_leap_second(text))
        local, instants = local_reading(wall, tz)
    except (ValueError, OverflowError):
        return Issue("value", f"{value!r} is not a valid date-time", (path,)), None
    zone = tz.key
    if instants == "single":
        return _read_as(value, zone, local.isoformat(), path), local.isoformat()
    if instants == "twice":
        later = wall.replace(tzinfo=tz, fold=1)
        why = (f"date-time {value!r} has no UTC offset and occurs twice in the lab time zone {zone} "
               f"(the clocks go back over it): it is {local.isoformat()} or {later.isoformat()}")
        if on_transition == "refuse":
            return _doubtful(why, path), None
        return _read_as(value, zone, local.isoformat(), path,
                        f"{why}; read as the first, {local.isoformat()}"), local.isoformat()
    shown = local.astimezone(UTC).astimezone(tz).isoformat()  # astimezone to its own zone would not convert
    why = (f"date-time {value!r} has no UTC offset and does not exist in the lab time zone {zone} "
           "(the clocks go forward over it)")
    if on_transition == "refuse":
        return _doubtful(why, path), None
    return _read_as(value, zone, local.isoformat(), path,
                    f"{why}; read with the offset before the change as {local.isoformat()}, "
                    f"which is {shown} on the changed clock"), local.isoformat()


def _doubtful(why: str, path: str) -> Issue:
    return Issue("value", f"{why}; send it with its UTC offset (or set LYTESTREAM_LAB_TIMEZONE_TRANSITIONS="
                 "accept to read it with a warning)", (path,), status=422)


def _read_as(value: str, zone: str, read: str, path: str, message: str | None = None) -> Issue:
    return Issue(
        "value",
        message or f"date-time {value!r} had no UTC offset; read in the lab time zone {zone} as {read}",
        (path,),
        severity="warning",
    )
