"""Refuse a collection (or insulin start) time beyond the future tolerance, naming the skew.

A result stamped hours after the server's clock is nearly always a sender's clock or time-zone fault
(a local time labelled ``Z``). Stored, it would sit outside every look-back window until the clock
caught up and be judged at the wrong time, or never; so it is refused with the FHIRPath of the
element, and the sender can fix and resend it. Within the tolerance it is accepted and judged as now.
``now`` comes from the injected clock (service/clock.py), never the wall clock.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from service.domain.arrival import duration_words
from service.errors import Issue
from service.fhir.normalise import IncomingInsulin, IncomingObservation, Invalid

__all__ = ["check_not_future"]

# A withdrawal must always be taken, whatever time it carries: it only ever removes evidence.
_WITHDRAWN = frozenset({"entered-in-error"})


def _observation_path(resource: dict[str, Any], root: str) -> str:
    """The element normalise_observation reads the collection time from."""
    for key in ("effectiveDateTime", "effectiveInstant"):
        if key in resource:
            return f"{root}.{key}"
    start = (resource.get("effectivePeriod") or {}).get("start")
    return f"{root}.effectivePeriod.{'start' if isinstance(start, str) and 'T' in start else 'end'}"


def _insulin_path(resource: dict[str, Any], root: str) -> str:
    if "effectiveDateTime" in resource:
        return f"{root}.effectiveDateTime"
    return f"{root}.effectivePeriod.start"


def check_not_future(incoming: IncomingObservation | IncomingInsulin, root: str, *, now: datetime,
                     tolerance: timedelta) -> None:
    """Raise Invalid (422) when the collection or start time is more than ``tolerance`` after ``now``."""
    if incoming.status in _WITHDRAWN:
        return
    if isinstance(incoming, IncomingObservation):
        when, verb, path = incoming.effective, "collected", _observation_path(incoming.resource, root)
    else:
        when, verb, path = incoming.start, "started", _insulin_path(incoming.resource, root)
    skew = when - now
    if skew <= tolerance:
        return
    raise Invalid([Issue(
        "business-rule",
        f"{verb} {duration_words(skew, round_up=True)} after the server's current time; "
        f"tolerance {duration_words(tolerance)}; check the sender's clock or time zone "
        f"(a local time labelled Z?); server time {now.isoformat().replace('+00:00', 'Z')}",
        (path,),
        status=422,
    )])
