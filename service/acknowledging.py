"""Acknowledging a Flag: the one service-level action behind ``$acknowledge`` and the board.

An acknowledgement is recorded (it stops escalation for the priority it saw) and shown on the Flag
itself: a new Flag version carrying the ``flag-acknowledgement`` extension, announced on flag-changed
like every version. It pages nobody (flag-alert carries what a responder must act on; another
member of the team having seen a Flag is not that). Acknowledging the version an acknowledgement
already produced is a no-op that says who acknowledged it and when. Every attempt is audited.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import select

from service.api.context import AppContext
from service.db.acks import record_ack
from service.db.audit import record_audit
from service.db.flags import subjects, write_event_version
from service.db.subscriptions import enqueue_events
from service.db.tables import FlagAck, FlagRecord
from service.errors import Issue, NotFound, RequestRejected
from service.fhir.audit_render import AuditFacts, Requester
from service.notify.bundles import interaction_for
from service.notify.topics import FLAG_CHANGED

__all__ = ["AckOutcome", "PERSON_MAX", "NOTE_MAX", "acknowledge"]

PERSON_MAX = 200  # characters of a named acknowledger
NOTE_MAX = 2000  # characters of a note

_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]
_ACK = FlagAck.__table__  # type: ignore[attr-defined]


@dataclass(frozen=True, slots=True)
class AckOutcome:
    """What an acknowledgement did. ``version_id`` is the Flag version that shows it; ``already`` is True
    when that version already showed an acknowledgement (then nothing was written, and ``by``,
    ``acknowledged_at`` and ``note`` are the earlier acknowledgement's)."""

    flag_id: str
    version_id: int
    acknowledged_version: int  # the Flag version that was acknowledged
    acknowledged_at: datetime
    by: str  # the named person, else the client
    client: str
    note: str | None
    already: bool

    @property
    def message(self) -> str:
        when = self.acknowledged_at.strftime("%Y-%m-%d %H:%M UTC")
        if self.already:
            return (f"Flag/{self.flag_id} version {self.acknowledged_version} was already acknowledged by "
                    f"{self.by} at {when}; nothing changed")
        return f"Flag/{self.flag_id} acknowledged by {self.by} at {when} (version {self.version_id})"


def acknowledge(ctx: AppContext, *, flag_id: str, who: Requester, person: str | None,
                note: str | None) -> AckOutcome:
    """Acknowledge the current version of an active Flag for ``who`` (the caller), in the name of
    ``person`` when given. Raises NotFound for a Flag not held here, RequestRejected (409) for one that
    is not active and (400) for a person or note that is blank or too long."""
    person = _checked(person, "who", PERSON_MAX)
    note = _checked(note, "note", NOTE_MAX) if note is not None and note.strip() else None
    now = ctx.clock.now()
    with ctx.db.session(write=True) as session:
        found = session.execute(select(_FLAG.c.patient_key).where(_FLAG.c.id == flag_id)).first()
        if found is None:
            raise NotFound(f"Flag/{flag_id} is not held here")
        ctx.db.lock_patients(session, [found.patient_key])
        flag = session.execute(select(_FLAG).where(_FLAG.c.id == flag_id)).one()
        if flag.status != "active":
            raise RequestRejected([Issue("business-rule", f"Flag/{flag_id} is {flag.status}; only an active "
                                         "Flag can be acknowledged", status=409)])
        subject = subjects(session=session, patient_keys=[flag.patient_key]).get(flag.patient_key, {})
        previous = session.execute(select(_ACK).where(_ACK.c.flag_id == flag_id)
                                   .order_by(_ACK.c.acknowledged_at.desc(), _ACK.c.flag_version.desc())
                                   .limit(1)).first()
        if (previous is not None and previous.flag_version + 1 == flag.version_id
                and previous.acknowledged_at == flag.last_updated):
            # The current version is the one that acknowledgement wrote: nothing new has been seen.
            outcome = AckOutcome(flag_id, flag.version_id, previous.flag_version, previous.acknowledged_at,
                                 previous.person or previous.client, previous.client, previous.note, True)
        else:
            by = person or who.client
            record_ack(session=session, flag_id=flag_id, flag_version=flag.version_id, client=who.client,
                       person=person, note=note, now=now)
            written = write_event_version(session=session, flag_id=flag_id, subject=subject,
                                          lead=f"Acknowledged by {by}: ", now=now)
            enqueue_events(session=session, topic=FLAG_CHANGED, now=now,
                           flags=[(flag_id, written.version_id, interaction_for(written.kind), written.flag)])
            outcome = AckOutcome(flag_id, written.version_id, flag.version_id, now, by, who.client, note, False)
        facts = AuditFacts(subtype="operation", operation="$acknowledge", recorded=now, requester=who,
                           patient=subject, what=[f"Flag/{flag_id}/_history/{outcome.version_id}"])
        record_audit(session=session, events=[(facts, flag.patient_key)], base_url=ctx.settings.base_url)
        return outcome


def _checked(value: str | None, name: str, limit: int) -> str | None:
    if value is None:
        return None
    text = value.strip()
    if not text:
        raise RequestRejected([Issue("value", f"{name} must not be blank")])
    if len(text) > limit:
        raise RequestRejected([Issue("too-long", f"{name} is {len(text)} characters; at most {limit} are kept "
                                     "with an acknowledgement")])
    return text
