"""Collection time against arrival time: the window a late result is judged in, and the words that
tell a reader a Flag rests on a result that reached us late.

Pure: no I/O, no clock. "Arrival" is when the cited version of a result was stored here; the delay
is arrival minus collection (effective) time. Decision support only.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import replace
from datetime import datetime, timedelta
from typing import Literal

from service.domain.findings import Finding
from service.domain.values import LabResult, Timeline

__all__ = ["DELAY_NUMBER", "Event", "duration_words", "note_arrival_delay", "note_late", "window_before"]

# The time a late item is judged at: a result's collection, or the end of an insulin administration.
Event = Literal["collection", "insulin-end"]

# The number a noted Flag carries beside its sentence, so the delay can be read without parsing text.
DELAY_NUMBER = "arrived_after_collection_hours"


def duration_words(delta: timedelta, *, round_up: bool = False) -> str:
    """A duration as a reader says it: "4 d 2 h", "3 h 10 min", "5 min".

    Whole minutes, shortened to days and hours from one day on. ``round_up`` rounds a part minute
    up, so a skew just beyond a tolerance never reads as equal to it.
    """
    seconds = max(delta.total_seconds(), 0.0)
    total = math.ceil(seconds / 60) if round_up else int(seconds // 60)
    days, rest = divmod(total, 24 * 60)
    hours, minutes = divmod(rest, 60)
    if days:
        return f"{days} d {hours} h" if hours else f"{days} d"
    if hours:
        return f"{hours} h {minutes} min" if minutes else f"{hours} h"
    return f"{minutes} min"


def window_before(timeline: Timeline, end: datetime, lookback: timedelta) -> Timeline:
    """The part of ``timeline`` a rule would have seen at ``end``: results drawn in (end - lookback, end]
    and the insulin exposures overlapping it, as the store's own timeline query selects them."""
    start = end - lookback
    return Timeline(
        patient=timeline.patient,
        window_start=start,
        window_end=end,
        results=tuple(r for r in timeline.results if start < r.effective <= end),
        exposures=tuple(x for x in timeline.exposures if x.start <= end and (x.end is None or x.end > start)),
        withdrawn=timeline.withdrawn,
    )


def _with_note(finding: Finding, words: str, delay: timedelta) -> Finding:
    # One plain sentence stays one sentence: the note becomes its last clause.
    sentence = finding.sentence.removesuffix(".")
    numbers = {**finding.numbers, DELAY_NUMBER: round(delay.total_seconds() / 3600, 2)}
    return replace(finding, sentence=f"{sentence}; {words}.", numbers=numbers)


def note_late(finding: Finding, *, delay: timedelta, lookback: timedelta, of: Event = "collection",
              window_end: Event = "collection") -> Finding:
    """The finding of a result (``of`` "insulin-end": an insulin administration) that arrived ``delay``
    after its collection (end), later than the look-back window; ``window_end`` says what the window it
    was judged in ends at."""
    span = f"{lookback.total_seconds() / 3600:g} h"
    after = "collection" if of == "collection" else "the insulin administration ended"
    ending = "at its collection time" if window_end == "collection" else "when the insulin administration ended"
    return _with_note(finding, f"arrived late, {duration_words(delay)} after {after}: evaluated in the "
                      f"{span} ending {ending}", delay)


def note_arrival_delay(finding: Finding, results: Iterable[LabResult], *, after: timedelta) -> Finding:
    """The finding, its sentence noting the delay when its newest cited result (the latest collected;
    of equal times the later arrival) arrived more than ``after`` after collection."""
    cited = set(finding.evidence)
    newest: LabResult | None = None
    for r in results:
        if r.reference in cited and (newest is None or (r.effective, r.arrived or r.effective)
                                     > (newest.effective, newest.arrived or newest.effective)):
            newest = r
    if newest is None or newest.arrived is None:
        return finding
    delay = newest.arrived - newest.effective
    if delay <= after:
        return finding
    return _with_note(finding, f"newest result arrived {duration_words(delay)} after collection", delay)
