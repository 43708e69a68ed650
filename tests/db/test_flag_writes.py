"""Flag rows: a re-keyed episode never collides with an older flag of the same key."""

from __future__ import annotations

from service.api.context import AppContext
from service.db.flags import open_flags, write_changes
from service.domain.flags import CloseFlag, CreateFlag, UpdateFlag
from tests.domain.test_flags import finding
from tests.domain.test_support import PATIENT, at


def test_rekeying_onto_a_closed_episode_reactivates_that_flag(context: AppContext) -> None:
    now = context.clock.now()
    early, later = finding(onset=at(2)), finding(onset=at(6))
    with context.db.session(write=True) as session:
        (b,) = write_changes(session=session, changes=[CreateFlag(early)], subject_of={}, policy_hash="h", now=now)
        (b_open,) = open_flags(session=session, patient_keys=[PATIENT])[PATIENT]
        write_changes(session=session, changes=[CloseFlag(b_open, now)], subject_of={}, policy_hash="h", now=now)
        (a,) = write_changes(session=session, changes=[CreateFlag(later)], subject_of={}, policy_hash="h", now=now)
        (a_open,) = open_flags(session=session, patient_keys=[PATIENT])[PATIENT]
        writes = write_changes(session=session, changes=[UpdateFlag(a_open, early)], subject_of={},
                               policy_hash="h", now=now)
        still_open = open_flags(session=session, patient_keys=[PATIENT])[PATIENT]
    assert [(w.kind, w.id) for w in writes] == [("close", a.id), ("reactivate", b.id)]
    assert [f.id for f in still_open] == [b.id]
