"""What the board shows for each active Flag, from facts read out of the store. Pure.

Order: priority first (high, medium, low), then the longest-waiting first — the Flag raised
earliest is the one the team has left longest. Priority is always a word and a shape as well as a
colour (WCAG 2.1 SC 1.4.1, use of colour).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

from service.vocabulary import PRIORITY_DISPLAY, priority_code

__all__ = ["AckFacts", "BoardRow", "FlagFacts", "LatestValue", "board_rows", "duration_words", "local_time"]

PRIORITY_WORD = {"PH": "High", "PM": "Medium", "PL": "Low"}
_RANK = {"high": 0, "medium": 1, "low": 2}


@dataclass(frozen=True, slots=True)
class LatestValue:
    analyte: str  # "sodium", "potassium", ...
    value: str  # as the lab sent it, e.g. "116"
    unit: str  # the lab's unit, e.g. "mmol/L" or "mg/dL"
    collected: datetime


@dataclass(frozen=True, slots=True)
class AckFacts:
    by: str
    at: datetime
    note: str | None
    covers: bool  # made at or after the priority the Flag now pages at; False: it saw a lower priority


@dataclass(frozen=True, slots=True)
class FlagFacts:
    id: str
    version_id: int
    rule: str
    rule_display: str
    priority: str  # high | medium | low
    sentence: str
    raised_at: datetime
    identifiers: Sequence[str]  # how the feed named the patient: MRN values first, then references
    encounter: str | None
    latest: LatestValue | None
    ack: AckFacts | None
    escalations: int
    last_updated: datetime


@dataclass(frozen=True, slots=True)
class BoardRow:
    id: str
    version_id: int
    priority_code: str
    priority_word: str
    priority_display: str
    rule: str
    rule_display: str
    sentence: str
    patient: str
    other_identifiers: tuple[str, ...]
    encounter: str | None
    latest: str | None
    latest_time: str | None
    raised_ago: str
    raised_local: str
    ack: str | None
    ack_note: str | None
    ack_stale: bool
    escalations: int


def board_rows(flags: Sequence[FlagFacts], now: datetime, zone: ZoneInfo | None) -> list[BoardRow]:
    ordered = sorted(flags, key=lambda f: (_RANK.get(f.priority, 9), f.raised_at, f.id))
    return [_row(f, now, zone) for f in ordered]


def _row(f: FlagFacts, now: datetime, zone: ZoneInfo | None) -> BoardRow:
    code = priority_code(f.priority)
    ids = tuple(f.identifiers) or ("(no identifier sent)",)
    latest = latest_time = None
    if f.latest is not None:
        latest = f"{f.latest.analyte.capitalize()} {f.latest.value} {f.latest.unit}"
        latest_time = local_time(f.latest.collected, zone)
    ack = ack_note = None
    stale = False
    if f.ack is not None:
        ack = f"{f.ack.by}, {local_time(f.ack.at, zone)}"
        ack_note = f.ack.note
        stale = not f.ack.covers
    return BoardRow(
        id=f.id, version_id=f.version_id, priority_code=code, priority_word=PRIORITY_WORD[code],
        priority_display=PRIORITY_DISPLAY[code], rule=f.rule, rule_display=f.rule_display, sentence=f.sentence,
        patient=ids[0], other_identifiers=ids[1:], encounter=f.encounter, latest=latest, latest_time=latest_time,
        raised_ago=duration_words(now - f.raised_at), raised_local=local_time(f.raised_at, zone), ack=ack,
        ack_note=ack_note, ack_stale=stale, escalations=f.escalations,
    )


def duration_words(span: timedelta) -> str:
    """"45 min", "2 h 05 min", "3 d 4 h": short enough for a column, exact to the minute."""
    minutes = max(int(span.total_seconds() // 60), 0)
    if minutes < 60:
        return f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    if hours < 24:
        return f"{hours} h {minutes:02d} min"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours} h"


def local_time(at: datetime, zone: ZoneInfo | None) -> str:
    """The time on the lab's clock (UTC when no lab time zone is set), with the zone named."""
    if zone is None:
        return at.strftime("%d %b %H:%M UTC")
    local = at.astimezone(zone)
    return f"{local.strftime('%d %b %H:%M')} {local.tzname()}"
