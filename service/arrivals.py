"""What became of each stored result, said in the answer: never accepted and ignored.

Called by ingest, in the unit of work, with every result and insulin administration version just
written (after the current-window re-evaluation). Two kinds of result would otherwise be stored as
"all ok" and never judged:

* one that **no rule can read** (service.domain.coverage): the entry's outcome says "stored but not
  evaluated" and why;
* one collected **before the look-back window** (now - lookback): the current window never holds
  it, so it is judged with the same rules in the window that ends at its own collection time (an
  insulin administration: at its end). A finding citing it is written as an inactive Flag whose
  period ends at that time, its sentence saying it arrived late and by how much, and is announced
  on the flag-changed topic like any new Flag (service.db.flags.write_late_flags says why inactive);
  such a result entered in error later withdraws that Flag (entered-in-error), as it would an active one.

Decision support only.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from datetime import datetime, timedelta
from functools import partial
from zoneinfo import ZoneInfo

from sqlmodel import Session

from service.db.flags import FlagWrite, subjects, withdraw_late_flags, write_late_flags
from service.db.subscriptions import enqueue_events
from service.db.timeline import load_timeline
from service.domain.arrival import Event, duration_words, note_late, window_before
from service.domain.coverage import unread_exposure, unread_result
from service.domain.findings import Finding, Rule
from service.domain.rules import evaluate
from service.domain.values import InsulinExposure, LabResult, ResultStatus, Timeline
from service.domain.wording import narrate
from service.errors import Issue
from service.notify.bundles import interaction_for
from service.notify.topics import FLAG_CHANGED
from service.policy import Policy, policy_hash

__all__ = ["ArrivalReview", "Stored"]

log = logging.getLogger("lytestream.arrivals")

Stored = LabResult | InsulinExposure

# A result without a number is most likely a sender's fault worth a look; the others are by design.
_WARNING = frozenset({"no-numeric-value"})


class _Late:
    """One stored version older than the window: where it is judged, and how it is cited."""

    __slots__ = ("anchor", "delay", "event", "reference", "slot")

    def __init__(self, slot: int, item: Stored, anchor: datetime, now: datetime) -> None:
        self.slot, self.anchor, self.reference, self.delay = slot, anchor, item.reference, now - anchor
        self.event: Event = "collection" if isinstance(item, LabResult) else "insulin-end"


class ArrivalReview:
    """The per-entry notes on stored results, and the own-window evaluation of late ones."""

    def __init__(self, *, policy: Policy, lookback: timedelta, lab_zone: ZoneInfo | None = None) -> None:
        self.policy = policy
        self.policy_hash = policy_hash(policy)
        self.lookback = lookback
        self.lab_zone = lab_zone

    def __call__(self, session: Session, stored: Mapping[int, Stored], now: datetime) -> dict[int, list[Issue]]:
        """Notes by entry slot for the versions in ``stored`` (slot → value), all written at ``now``."""
        notes: dict[int, list[Issue]] = {}
        late: dict[str, list[_Late]] = {}
        withdrawn: dict[str, set[str]] = {}
        start = now - self.lookback
        for slot, item in sorted(stored.items()):
            unread = unread_result(item, self.policy) if isinstance(item, LabResult) \
                else unread_exposure(item, self.policy)
            if isinstance(item, LabResult) and item.status is ResultStatus.ENTERED_IN_ERROR and item.effective <= start:
                withdrawn.setdefault(item.patient, set()).add(f"Observation/{item.observation_id}")
            if unread is not None:
                severity = "warning" if unread.code in _WARNING else "information"
                notes[slot] = [Issue("informational", f"stored but not evaluated: {unread.reason}",
                                     severity=severity)]
                continue
            anchor = item.effective if isinstance(item, LabResult) else item.end
            if anchor is not None and anchor <= start:
                late.setdefault(item.patient, []).append(_Late(slot, item, anchor, now))
        written: list[FlagWrite] = []
        for patient, items in sorted(late.items()):
            written += self._judge_late(session, patient, items, now)
            for x in items:
                verb, at = ("collected", "collection") if x.event == "collection" else ("ended", "end")
                notes.setdefault(x.slot, []).append(Issue("informational", (
                    f"{verb} {duration_words(x.delay)} before it arrived, so before the {self._hours} "
                    f"look-back window: evaluated in the {self._hours} ending at its {at} time"),
                    severity="information"))
        for patient, refs in sorted(withdrawn.items()):
            written += withdraw_late_flags(session=session, patient_key=patient, withdrawn=refs,
                                           subject_of=subjects(session=session, patient_keys=[patient]), now=now)
        if written:
            enqueue_events(session=session, topic=FLAG_CHANGED, now=now,
                           flags=[(w.id, w.version_id, interaction_for(w.kind), w.flag) for w in written])
            log.info("evaluation", extra={"trigger": "late-results", "late_results": sum(len(v) for v in late.values()),
                                          "flags_changed": len(written)})
        return notes

    @property
    def _hours(self) -> str:
        return f"{self.lookback.total_seconds() / 3600:g} h"

    def _judge_late(self, session: Session, patient: str, items: list[_Late], now: datetime) -> list[FlagWrite]:
        """Evaluate each late item in the window ending at its time; one timeline query for them all."""
        anchors = sorted({x.anchor for x in items})
        full = load_timeline(session=session, patient_key=patient, end=anchors[-1],
                             lookback=anchors[-1] - anchors[0] + self.lookback)
        # Of one episode judged at several anchors (a late run of results), the latest finding stands.
        found: dict[tuple[Rule, str], tuple[Finding, datetime]] = {}
        by_reference = {x.reference: x for x in items}
        for anchor in anchors:
            ends: Event = "collection" if any(x.anchor == anchor and x.event == "collection" for x in items) \
                else "insulin-end"
            window = window_before(full, anchor, self.lookback)
            judged = evaluate(window, self.policy, anchor)
            told = narrate(judged, window, partial(_evaluate_at, policy=self.policy, now=anchor), self.lab_zone)
            for finding in told:
                cited = [by_reference[ref] for ref in finding.evidence if ref in by_reference]
                if cited:
                    # The newest cited result speaks for the finding; an administration only when no
                    # result it cites is late.
                    first = min(cited, key=lambda x: (x.event != "collection", x.delay))
                    noted = note_late(finding, delay=first.delay, lookback=self.lookback, of=first.event,
                                      window_end=ends)
                    found[(finding.rule, finding.episode)] = (noted, anchor)
        if not found:
            return []
        return write_late_flags(session=session, findings=[found[k] for k in sorted(found)],
                                subject_of=subjects(session=session, patient_keys=[patient]),
                                policy_hash=self.policy_hash, now=now)


def _evaluate_at(timeline: Timeline, *, policy: Policy, now: datetime) -> list[Finding]:
    return evaluate(timeline, policy, now)
