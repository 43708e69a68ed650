"""Flag rows: open flags per patient, and writing the changes reconcile() decided, version by version."""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime
from typing import Any

import orjson
from sqlalchemy import insert, or_, select, update
from sqlmodel import Session

from service.db.acks import covering_acks
from service.db.tables import FhirVersion, FlagRecord, InsulinRecord, ObservationRecord, PatientAlias
from service.domain.findings import Finding, Priority, Rule
from service.domain.flags import CloseFlag, CreateFlag, FlagChange, OpenFlag, UpdateFlag
from service.domain.wording import closed_lead, untold, withdrawn_lead
from service.fhir.flag_render import ACKNOWLEDGEMENT_URL, AckView, FlagView, render_flag, subject_reference

__all__ = [
    "FlagWrite",
    "drop_acknowledgement",
    "write_event_version",
    "open_flags",
    "patients_to_recheck",
    "subjects",
    "withdraw_late_flags",
    "write_changes",
    "write_late_flags",
]

_FLAG = FlagRecord.__table__  # type: ignore[attr-defined]
_V = FhirVersion.__table__  # type: ignore[attr-defined]
_INS = InsulinRecord.__table__  # type: ignore[attr-defined]
_ALIAS = PatientAlias.__table__  # type: ignore[attr-defined]
_OBS = ObservationRecord.__table__  # type: ignore[attr-defined]


def open_flags(*, session: Session, patient_keys: Iterable[str]) -> dict[str, list[OpenFlag]]:
    """Active flags of these patients, by patient key."""
    out: dict[str, list[OpenFlag]] = {}
    keys = sorted(set(patient_keys))
    for i in range(0, len(keys), 500):
        rows = session.execute(
            select(_FLAG).where(_FLAG.c.patient_key.in_(keys[i : i + 500]), _FLAG.c.status == "active")
        )
        for r in rows:
            out.setdefault(r.patient_key, []).append(OpenFlag(
                id=r.id, patient=r.patient_key, rule=Rule(r.rule), episode=r.episode,
                evidence=tuple(orjson.loads(r.evidence)), numbers=orjson.loads(r.numbers),
                sentence=r.sentence, priority=Priority(r.priority), period_start=r.period_start,
                encounter=r.encounter,
            ))
    return out


def subjects(*, session: Session, patient_keys: Iterable[str]) -> dict[str, dict[str, Any]]:
    """The FHIR subject Reference for each patient, naming it every way the feed has: the first literal
    reference (by alias order) in ``reference``, the first identifier in ``identifier`` (R4 allows both
    on one Reference), and every other one in a ``subject-alias`` extension on the Reference."""
    rows = session.execute(select(_ALIAS.c.patient_key, _ALIAS.c.alias).where(
        _ALIAS.c.patient_key.in_(sorted(set(patient_keys)))).order_by(_ALIAS.c.alias))
    aliases: dict[str, list[str]] = {}
    for key, alias in rows:
        aliases.setdefault(key, []).append(alias)
    return {key: subject_reference(names) for key, names in aliases.items()}


class FlagWrite:
    """One written flag version (for the response, notifications and tests). ``row`` is the flag row
    as this version left it (rule, priority, numbers: what deciding a page needs)."""

    __slots__ = ("flag", "id", "kind", "row", "version_id")

    def __init__(self, kind: str, id: str, version_id: int, flag: dict[str, Any], row: Any = None) -> None:
        self.kind, self.id, self.version_id, self.flag, self.row = kind, id, version_id, flag, row


def write_changes(
    *,
    session: Session,
    changes: Sequence[FlagChange],
    subject_of: Mapping[str, Mapping[str, Any]],
    policy_hash: str,
    now: datetime,
) -> list[FlagWrite]:
    """Apply each change as a new Flag version; a recurring (patient, rule, episode) is reactivated."""
    written: list[FlagWrite] = []
    for change in changes:
        if isinstance(change, (CreateFlag, UpdateFlag)):
            f = change.finding
            values = _finding_values(f, policy_hash)
            prior = change.flag if isinstance(change, UpdateFlag) else None
            if prior is not None and prior.episode != f.episode:
                # A re-keyed episode whose new key an older, closed flag already holds: that flag
                # is reactivated and the open one closes, so the unique key is never duplicated.
                clash = _existing(session, f)
                if clash is not None and clash.id != prior.id:
                    written += write_changes(session=session, changes=[CloseFlag(prior, now)],
                                             subject_of=subject_of, policy_hash=policy_hash, now=now)
                    prior = None
            row = _existing(session, f) if prior is None else session.execute(
                select(_FLAG).where(_FLAG.c.id == prior.id)).first()
            if row is None:
                rid, version = str(uuid.uuid4()), 1
                session.execute(insert(_FLAG).values(id=rid, version_id=1, last_updated=now, raised_at=now,
                                                     priority_since=now, **values))
            else:
                rid, version = row.id, row.version_id + 1
                # A recurring episode is raised anew: its priority, too, begins now.
                raised = {"raised_at": now, "priority_since": now} if prior is None else {}
                session.execute(update(_FLAG).where(_FLAG.c.id == rid).values(
                    version_id=version, last_updated=now, **raised, **values))
            kind = "create" if row is None else ("reactivate" if prior is None else "update")
        else:
            status = "inactive" if isinstance(change, CloseFlag) else "entered-in-error"
            end = change.end if isinstance(change, CloseFlag) else change.at
            row = session.execute(select(_FLAG).where(_FLAG.c.id == change.flag.id)).one()
            rid, version = row.id, row.version_id + 1
            session.execute(update(_FLAG).where(_FLAG.c.id == rid).values(
                status=status, period_end=end, version_id=version, last_updated=now))
            kind = "close" if isinstance(change, CloseFlag) else "withdraw"
        current = session.execute(select(_FLAG).where(_FLAG.c.id == rid)).one()
        lead = "" if kind in ("create", "reactivate", "update") else _ending_lead(kind, current)
        flag = _render(session, current, subject_of.get(current.patient_key, {}), lead)
        session.execute(insert(_V).values(resource_type="Flag", id=rid, version_id=version, last_updated=now,
                                          request_id=None, resource=orjson.dumps(flag)))
        written.append(FlagWrite(kind, rid, version, flag, current))
    return written


def write_late_flags(
    *,
    session: Session,
    findings: Sequence[tuple[Finding, datetime]],
    subject_of: Mapping[str, Mapping[str, Any]],
    policy_hash: str,
    now: datetime,
) -> list[FlagWrite]:
    """Write the findings of results judged in their own, past window: each as an inactive Flag whose
    period ends at its evidence's time (``findings`` pairs each with that time).

    Inactive, because the danger is one the data showed then: the current window, judged by the normal
    lifecycle, says whether it still stands, and an active Flag it does not find would be closed on the
    next evaluation before anyone saw it (see README, Flags). A Flag of the same episode that is active
    belongs to the current window and is left alone; one that is closed gets a new version when the
    finding differs; a finding already written writes nothing.
    """
    written: list[FlagWrite] = []
    for f, end in findings:
        values = _finding_values(f, policy_hash) | {"status": "inactive", "period_end": end}
        row = _existing(session, f)
        if row is None:
            rid, version, kind = str(uuid.uuid4()), 1, "create"
            session.execute(insert(_FLAG).values(id=rid, version_id=1, last_updated=now, raised_at=now,
                                                 priority_since=now, **values))
        elif row.status == "active":
            continue
        else:
            if row.period_end is not None and row.period_end > end:
                values["period_end"] = row.period_end  # it stood until then: keep the later end
            if all(getattr(row, k) == v for k, v in values.items()):
                continue
            rid, version, kind = row.id, row.version_id + 1, "update"
            session.execute(update(_FLAG).where(_FLAG.c.id == rid).values(version_id=version, last_updated=now,
                                                                           **values))
        current = session.execute(select(_FLAG).where(_FLAG.c.id == rid)).one()
        flag = _render(session, current, subject_of.get(current.patient_key, {}))
        session.execute(insert(_V).values(resource_type="Flag", id=rid, version_id=version, last_updated=now,
                                          request_id=None, resource=orjson.dumps(flag)))
        written.append(FlagWrite(kind, rid, version, flag))
    return written


def withdraw_late_flags(
    *,
    session: Session,
    patient_key: str,
    withdrawn: Iterable[str],
    subject_of: Mapping[str, Mapping[str, Any]],
    now: datetime,
) -> list[FlagWrite]:
    """Inactive Flags of the patient citing a result of ``withdrawn`` (versionless "Observation/<id>",
    results older than the look-back window just entered in error) whose every cited Observation is
    now entered in error: each gets a version with status entered-in-error, as an active Flag would.

    The current window's lifecycle never sees these Flags (it opens active ones only), so without this
    a late Flag would go on citing a result its lab has withdrawn.
    """
    gone = set(withdrawn)
    written: list[FlagWrite] = []
    rows = session.execute(select(_FLAG).where(_FLAG.c.patient_key == patient_key,
                                               _FLAG.c.status == "inactive").order_by(_FLAG.c.id)).all()
    for row in rows:
        cited = {ref.split("/_history/")[0] for ref in orjson.loads(row.evidence) if ref.startswith("Observation/")}
        if not cited & gone:
            continue
        ids = [ref.split("/")[1] for ref in cited]
        statuses = dict(session.execute(select(_OBS.c.id, _OBS.c.status).where(_OBS.c.id.in_(ids))).all())
        if any(statuses.get(i) != "entered-in-error" for i in ids):
            continue
        version = row.version_id + 1
        session.execute(update(_FLAG).where(_FLAG.c.id == row.id).values(
            status="entered-in-error", version_id=version, last_updated=now))
        current = session.execute(select(_FLAG).where(_FLAG.c.id == row.id)).one()
        flag = _render(session, current, subject_of.get(current.patient_key, {}), _ending_lead("withdraw", current))
        session.execute(insert(_V).values(resource_type="Flag", id=row.id, version_id=version, last_updated=now,
                                          request_id=None, resource=orjson.dumps(flag)))
        written.append(FlagWrite("withdraw", row.id, version, flag))
    return written


def write_event_version(
    *, session: Session, flag_id: str, subject: Mapping[str, Any], lead: str, now: datetime
) -> FlagWrite:
    """A new version of the Flag that changes nothing the rules decide: it shows what happened to it
    (an acknowledgement, an escalation) in ``lead`` before the sentence, and the acknowledgement that
    now covers it. The flag row's evidence, numbers and sentence stay as they were, so the next
    evaluation does not see the event as a difference."""
    row = session.execute(select(_FLAG).where(_FLAG.c.id == flag_id)).one()
    version = row.version_id + 1
    session.execute(update(_FLAG).where(_FLAG.c.id == flag_id).values(version_id=version, last_updated=now))
    current = session.execute(select(_FLAG).where(_FLAG.c.id == flag_id)).one()
    flag = _render(session, current, subject, lead)
    session.execute(insert(_V).values(resource_type="Flag", id=flag_id, version_id=version, last_updated=now,
                                      request_id=None, resource=orjson.dumps(flag)))
    return FlagWrite("update", flag_id, version, flag, current)


def drop_acknowledgement(*, session: Session, written: FlagWrite) -> None:
    """Take the acknowledgement off a version just written (not yet announced): a page that asks for a
    fresh acknowledgement (raised again, a priority rise) was decided after it was rendered."""
    kept = [e for e in written.flag["extension"] if e["url"] != ACKNOWLEDGEMENT_URL]
    if len(kept) == len(written.flag["extension"]):
        return
    written.flag["extension"] = kept
    session.execute(update(_V).where(_V.c.resource_type == "Flag", _V.c.id == written.id,
                                     _V.c.version_id == written.version_id)
                    .values(resource=orjson.dumps(written.flag)))


def _render(session: Session, row: Any, subject: Mapping[str, Any], lead: str = "") -> dict[str, Any]:
    """The Flag JSON of a row; a version with a ``lead`` of its own (resolved, withdrawn, acknowledged,
    escalated) quotes the finding's sentence without the finding's lead ("Raised: …")."""
    ack = covering_acks(session=session, flags=[row]).get(row.id)
    return render_flag(_view(row, subject, ack, lead))


def _ending_lead(kind: str, row: Any) -> str:
    return closed_lead() if kind == "close" else withdrawn_lead(row.rule, orjson.loads(row.numbers))


def _existing(session: Session, f: Finding) -> Any:
    return session.execute(select(_FLAG).where(
        _FLAG.c.patient_key == f.patient, _FLAG.c.rule == f.rule.value, _FLAG.c.episode == f.episode)).first()


def _finding_values(f: Finding, policy_hash: str) -> dict[str, Any]:
    return {
        "patient_key": f.patient, "rule": f.rule.value, "episode": f.episode, "status": "active",
        "priority": f.priority.value, "period_start": f.onset, "period_end": None,
        "evidence": orjson.dumps(list(f.evidence)).decode(), "numbers": orjson.dumps(dict(f.numbers)).decode(),
        "sentence": f.sentence, "encounter": f.encounter, "policy_hash": policy_hash,
    }


def _view(r: Any, subject: Mapping[str, Any], ack: AckView | None = None, lead: str = "") -> FlagView:
    return FlagView(
        id=r.id, version_id=r.version_id, last_updated=r.last_updated, status=r.status, rule=r.rule,
        episode=r.episode, priority=r.priority, period_start=r.period_start, period_end=r.period_end,
        evidence=orjson.loads(r.evidence), numbers=orjson.loads(r.numbers),
        sentence=untold(r.sentence) if lead else r.sentence,
        subject=subject, encounter=r.encounter, policy_hash=r.policy_hash, acknowledgement=ack, lead=lead,
    )


def patients_to_recheck(*, session: Session, since: datetime) -> list[str]:
    """Patients whose flags may change with time alone: an active flag, or insulin running or
    recently stopped (a recheck may fall due)."""
    keys = {k for (k,) in session.execute(select(_FLAG.c.patient_key).where(_FLAG.c.status == "active").distinct())}
    keys |= {k for (k,) in session.execute(select(_INS.c.patient_key).where(
        or_(_INS.c.end.is_(None), _INS.c.end >= since)).distinct())}
    return sorted(keys)
