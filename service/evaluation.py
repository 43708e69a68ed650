"""Re-evaluation: the touched patients' timelines → rules → reconcile → Flag versions, in the caller's
unit of work. Called by ingest for every accepted change and by the scheduler when time alone may
change a flag (a potassium recheck falls due, an episode ages out of its window).
"""

from __future__ import annotations

import logging
import time
from collections import Counter
from collections.abc import Iterable, Sequence
from datetime import datetime, timedelta
from zoneinfo import ZoneInfo

import orjson
from sqlmodel import Session

from service.db.acks import claim_escalation, due_escalations
from service.db.alerts import paged_of, record_page
from service.db.engine import Database
from service.db.flags import (
    FlagWrite,
    drop_acknowledgement,
    open_flags,
    patients_to_recheck,
    subjects,
    write_changes,
    write_event_version,
)
from service.db.subscriptions import enqueue_events
from service.db.timeline import load_timelines
from service.domain.alerting import Change, Paged, measure_of, page_reason
from service.domain.arrival import duration_words, note_arrival_delay
from service.domain.findings import Finding, Priority
from service.domain.flags import FlagChange, reconcile
from service.domain.rules import evaluate
from service.domain.values import Timeline
from service.domain.wording import narrate
from service.notify.bundles import interaction_for
from service.notify.topics import FLAG_ALERT, FLAG_CHANGED, FLAG_ESCALATED
from service.ops.metrics import ESCALATIONS, FLAG_CHANGES, after_commit, change_word
from service.policy import Policy, policy_hash

__all__ = ["Evaluator"]

log = logging.getLogger("lytestream.evaluation")


class Evaluator:
    """Brings the Flags of some patients in line with their data, the policy and ``now``."""

    def __init__(self, *, policy: Policy, lookback: timedelta, lab_zone: ZoneInfo | None = None) -> None:
        self.policy = policy
        self.policy_hash = policy_hash(policy)
        self.lookback = lookback
        self.lab_zone = lab_zone  # collection times are said in it (UTC, said so, when None)

    def __call__(self, session: Session, patient_keys: Iterable[str], now: datetime) -> list[FlagWrite]:
        """Re-evaluate these patients (their locks must be held) and write any Flag changes; one log line."""
        started = time.perf_counter()
        keys = sorted(set(patient_keys))
        written = self._evaluate(session, keys, now)
        log.info("evaluation", extra={"trigger": "ingest", "patients": len(keys), "flags_changed": len(written),
                                      "duration_ms": round((time.perf_counter() - started) * 1000, 1)})
        return written

    def _evaluate(self, session: Session, keys: list[str], now: datetime) -> list[FlagWrite]:
        end, lookback = self._window(now)
        timelines = load_timelines(session=session, patient_keys=keys, end=end, lookback=lookback)
        opened = open_flags(session=session, patient_keys=keys)
        changes: list[FlagChange] = []
        for key in keys:
            timeline = timelines[key]
            told = narrate(evaluate(timeline, self.policy, now), timeline,
                           lambda t: evaluate(t, self.policy, now), self.lab_zone)
            findings = self._noted(told, timeline)
            changes += reconcile(findings, opened.get(key, []), timelines[key].withdrawn, now)
        if not changes:
            return []
        subject_of = subjects(session=session, patient_keys=keys)
        written = write_changes(session=session, changes=changes, subject_of=subject_of,
                                policy_hash=self.policy_hash, now=now)
        # The outbox rows commit with the Flag versions they announce: every version for integrations,
        # and those a responder must act on for the responder topic.
        enqueue_events(session=session, topic=FLAG_CHANGED, now=now,
                       flags=[(w.id, w.version_id, interaction_for(w.kind), w.flag) for w in written])
        paging = self._pages(session, written, now)
        if paging:  # most new versions page nobody: leave the subscription rows unlocked then
            enqueue_events(session=session, topic=FLAG_ALERT, now=now,
                           flags=[(w.id, w.version_id, interaction_for(w.kind), w.flag) for w in paging])
        counted = Counter((change_word(w.kind), w.row.rule, w.row.priority) for w in written)

        def count() -> None:
            for labels, n in counted.items():
                FLAG_CHANGES.labels(*labels).inc(n)

        after_commit(session, count)
        log.debug("flags changed: %s; %d paged", ", ".join(sorted({w.kind for w in written})), len(paging))
        return written

    def _pages(self, session: Session, written: Sequence[FlagWrite], now: datetime) -> list[FlagWrite]:
        """The versions that page the responder topic, each judged against the last page of its Flag;
        what each page carried is recorded on the flag row."""
        last: dict[str, Paged] = {}
        paging: list[FlagWrite] = []
        for w in written:
            row = w.row
            previous = last.get(w.id) or paged_of(row)
            priority, numbers = Priority(row.priority), orjson.loads(row.numbers)
            kind: Change = w.kind  # type: ignore[assignment]  # the writer's kinds are exactly Change
            reason = page_reason(change=kind, rule=row.rule, priority=priority, numbers=numbers,
                                 last=previous, steps=self.policy.alerting)
            if reason is None:
                continue
            sent = Paged(priority, measure_of(row.rule, numbers))
            record_page(session=session, flag_id=w.id, paged=sent, reopens_escalation=reason.reopens_escalation,
                        now=now)
            if reason.reopens_escalation:  # an older acknowledgement no longer covers this version
                drop_acknowledgement(session=session, written=w)
            last[w.id] = sent
            paging.append(w)
        return paging
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
        """Escalate each active Flag of an escalated priority that no acknowledgement covers, once per
        interval of its priority."""
        after = {p.value: timedelta(minutes=m) for p, m in self.policy.escalation.after_minutes.items()}
        with db.session() as session:
            due = due_escalations(session=session, after=after, now=now)
        sent = 0
        for item in due:
            with db.session(write=True) as session:
                db.lock_patients(session, [item.patient_key])
                if not claim_escalation(session=session, due=item, after=after, now=now):
                    continue  # another replica took this round, or the Flag changed since it was found
                # The escalation is a Flag version of its own, so the Flag says it was escalated and
                # for how long nobody acknowledged it; the rule's columns are untouched (no difference
                # for the next evaluation to undo).
                key = item.patient_key
                subject = subjects(session=session, patient_keys=[key]).get(key, {})
                lead = f"Escalation {item.round}: unacknowledged for {duration_words(now - item.priority_since)}. "
                w = write_event_version(session=session, flag_id=item.flag_id, subject=subject, lead=lead, now=now)
                event = [(w.id, w.version_id, interaction_for(w.kind), w.flag)]
                enqueue_events(session=session, topic=FLAG_CHANGED, now=now, flags=event)
                queued = enqueue_events(session=session, topic=FLAG_ESCALATED, now=now, flags=event)
                after_commit(session, lambda n=queued: ESCALATIONS.inc(n))  # type: ignore[misc]
                sent += queued
        if due:
            log.info("escalation", extra={"due": len(due), "notifications": sent})
        return sent

    def recheck(self, db: Database, now: datetime) -> int:
        """The time-driven pass: each candidate patient in its own short unit of work, under its lock,
        so it is safe when several replicas run it (the second finds nothing left to change)."""
        started = time.perf_counter()
        with db.session() as session:
            keys = patients_to_recheck(session=session, since=now - self.lookback)
        changed = 0
        for key in keys:
            with db.session(write=True) as session:
                db.lock_patients(session, [key])
                changed += len(self._evaluate(session, [key], now))
        log.info("evaluation", extra={"trigger": "recheck", "patients": len(keys), "flags_changed": changed,
                                      "duration_ms": round((time.perf_counter() - started) * 1000, 1)})
        return changed
