"""Re-evaluation: the touched patients' timelines → rules → reconcile → Flag versions, in the caller's
unit of work. Called by ingest for every accepted change and by the scheduler when time alone may
change a flag (a potassium recheck falls due, an episode ages out of its window).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable
from datetime import datetime, timedelta

from sqlmodel import Session

from service.db.acks import claim_escalation, due_escalations
from service.db.engine import Database
from service.db.flags import (
    FlagWrite,
    open_flags,
    patients_to_recheck,
    subjects,
    write_changes,
)
from service.db.subscriptions import enqueue_events, flag_version
from service.db.timeline import load_timelines
from service.domain.arrival import note_arrival_delay
from service.domain.findings import Finding
from service.domain.flags import FlagChange, reconcile
from service.domain.rules import evaluate
from service.domain.values import Timeline
from service.notify.bundles import interaction_for
from service.notify.topics import FLAG_CHANGED, FLAG_ESCALATED
from service.policy import Policy, policy_hash

__all__ = ["Evaluator"]

log = logging.getLogger("lytestream.evaluation")


class Evaluator:
    """Brings the Flags of some patients in line with their data, the policy and ``now``."""

    def __init__(self, *, policy: Policy, lookback: timedelta) -> None:
        self.policy = policy
        self.policy_hash = policy_hash(policy)
        self.lookback = lookback

    def __call__(self, session: Session, patient_keys: Iterable[str], now: datetime) -> list[FlagWrite]:
        """Re-evaluate these patients (their locks must be held) and write any Flag changes."""
        keys = sorted(set(patient_keys))
        end, lookback = self._window(now)
        timelines = load_timelines(session=session, patient_keys=keys, end=end, lookback=lookback)
        opened = open_flags(session=session, patient_keys=keys)
        changes: list[FlagChange] = []
        for key in keys:
            findings = self._noted(evaluate(timelines[key], self.policy, now), timelines[key])
            changes += reconcile(findings, opened.get(key, []), timelines[key].withdrawn, now)
        if not changes:
            return []
        subject_of = subjects(session=session, patient_keys=keys)
        written = write_changes(session=session, changes=changes, subject_of=subject_of,
                                policy_hash=self.policy_hash, now=now)
        # The outbox rows commit with the Flag versions they announce.
        enqueue_events(session=session, topic=FLAG_CHANGED, now=now,
                       flags=[(w.id, w.version_id, interaction_for(w.kind), w.flag) for w in written])
        log.info("flags changed: %s", ", ".join(sorted({w.kind for w in written})))
        return written

    def _window(self, now: datetime) -> tuple[datetime, timedelta]:
        """The current window: (now - lookback, now + the future tolerance], so a result stamped a
        little after the server's clock (drift the policy tolerates; ingest refuses more) is judged as
        now rather than left out until the clock catches up."""
        ahead = timedelta(minutes=self.policy.timing.future_tolerance_minutes)
        return now + ahead, self.lookback + ahead

    def _noted(self, findings: list[Finding], timeline: Timeline) -> list[Finding]:
        """Findings whose newest result arrived late say so (policy [timing] late_note_after_minutes)."""
        after = timedelta(minutes=self.policy.timing.late_note_after_minutes)
        return [note_arrival_delay(f, timeline.results, after=after) for f in findings]

    def escalate(self, db: Database, now: datetime) -> int:
        """Escalate each active, unacknowledged Flag of an escalated priority once per interval."""
        rules = self.policy.escalation
        interval = timedelta(minutes=rules.unacknowledged_minutes)
        with db.session() as session:
            due = due_escalations(session=session, priorities=[p.value for p in rules.priorities],
                                  interval=interval, now=now)
        sent = 0
        for item in due:
            with db.session(write=True) as session:
                db.lock_patients(session, [item.patient_key])
                if not claim_escalation(session=session, due=item, now=now):
                    continue  # another replica took this round
                flag = flag_version(session=session, flag_id=item.flag_id, version=item.version_id)
                if flag is not None:
                    sent += enqueue_events(session=session, topic=FLAG_ESCALATED, now=now,
                                           flags=[(item.flag_id, item.version_id, "update", flag)])
        return sent

    def recheck(self, db: Database, now: datetime) -> int:
        """The time-driven pass: each candidate patient in its own short unit of work, under its lock,
        so it is safe when several replicas run it (the second finds nothing left to change)."""
        with db.session() as session:
            keys = patients_to_recheck(session=session, since=now - self.lookback)
        changed = 0
        for key in keys:
            with db.session(write=True) as session:
                db.lock_patients(session, [key])
                changed += len(self(session, [key], now))
        return changed
