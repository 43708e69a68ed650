"""Collection time against arrival time: the window a late result is judged in, and the words that
tell a reader a Flag rests on a result that reached us late.

Pure: no I/O, no clock. "Arrival" is when the cited version of a result was stored here; the delay
is arrival minus collection (effective) time. Decision support only.
"""

from __future__ import annotations

import math
from datetime import timedelta

__all__ = ["duration_words"]


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
