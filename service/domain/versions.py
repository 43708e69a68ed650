"""Whether an incoming version of a result replaces the one held. Pure, so replays can be reasoned about.

The order of the final state must not depend on arrival order, so a version wins by status rank
first (a preliminary never overwrites a final; entered-in-error is final and last), then by its
``issued`` time; only when neither tells them apart does the later arrival win.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from enum import StrEnum

__all__ = ["Decision", "Held", "decide", "status_rank"]

_RANK = {
    "registered": 0,
    "unknown": 0,
    "preliminary": 1,
    "final": 2,
    "cancelled": 2,
    "amended": 3,
    "corrected": 3,
    "entered-in-error": 9,
    # MedicationAdministration: a stop or completion supersedes an ongoing record.
    "in-progress": 1,
    "on-hold": 1,
    "not-done": 2,
    "completed": 2,
    "stopped": 2,
}


def status_rank(status: str) -> int:
    return _RANK.get(status, 0)


class Decision(StrEnum):
    CREATE = "create"  # 201: a new resource
    UPDATE = "update"  # 200: a new version
    UNCHANGED = "unchanged"  # 200: an identical resend, nothing written
    STALE = "stale"  # 200 + warning: older than what is held, not applied
    EXISTS = "exists"  # 200: conditional create matched, the post is ignored


@dataclass(frozen=True, slots=True)
class Held:
    """What the decision needs to know of the stored current version."""

    status: str
    issued: datetime | None
    content_hash: str


def decide(
    held: Held | None,
    *,
    status: str,
    issued: datetime | None,
    content_hash: str,
    if_none_exist: bool = False,
) -> Decision:
    """The fate of an incoming version against the held one."""
    if held is None:
        return Decision.CREATE
    if if_none_exist:
        return Decision.EXISTS
    if held.content_hash == content_hash:
        return Decision.UNCHANGED
    new_rank, old_rank = status_rank(status), status_rank(held.status)
    if new_rank != old_rank:
        return Decision.UPDATE if new_rank > old_rank else Decision.STALE
    if issued is not None and held.issued is not None and issued < held.issued:
        return Decision.STALE
    return Decision.UPDATE
