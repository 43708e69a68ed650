"""The informatics summary of a date range [start, end): what was flagged, how fast, and what it cost. Pure.

Two kinds of figure, kept apart on purpose:

* **The Flag cohort** — every Flag whose *first version* was written in [start, end). A Flag counts once,
  in the range of its first version, however many versions follow. Counts by rule and priority, the
  burden numerator, both latencies, acknowledgements and escalations are about this cohort (its
  acknowledgements and escalations are counted whenever they happened, up to the time of the report), so
  the per-Flag export rows add up to the summary.
* **Activity in the range** — results stored, patient-days, notifications and AuditEvents whose own time
  falls in [start, end).

Where each figure comes from (so an analyst can recount it by hand):

=============================  ===========================================================================
figure                         source
=============================  ===========================================================================
flags raised, by rule,         ``fhir_version`` rows of type Flag: version 1's ``last_updated`` is the
by priority                    raising time; rule and priority are read from version 1's JSON; the status
                               shown is the newest version's
results stored                 ``fhir_version`` rows of type Observation, version 1, ``last_updated`` in
                               the range (a correction is a new version of the same result, not a new one)
patient-days                   distinct (``observation.patient_key``, UTC calendar date of that version
                               1's ``last_updated``) pairs among the results stored in the range
results not evaluated,         the results stored in the range whose current ``observation`` row no rule
by reason                      can read (service.domain.coverage, under the policy in force): ``status``
                               registered / cancelled / entered-in-error, ``value`` null, ``specimen``
                               urine, ``analyte`` urea, ``calculated`` true, or a specimen no rule of the
                               policy reads; one reason each, checked in that order
result → Flag                  the Flag's version 1 JSON (``flag-detail`` references, version-specific),
                               each referenced Observation version's JSON in ``fhir_version`` (``issued``)
                               and that Observation's version 1 ``last_updated`` (arrival)
Flag → acknowledgement         ``flag_ack``: the earliest ``acknowledged_at`` of each Flag (also audited as
                               AuditEvents of subtype ``acknowledge``)
escalations                    ``flag_escalation`` rows of the cohort's Flags
notifications                  ``subscription_event`` (the outbox) rows created in the range, with their
                               tries counted from ``delivery_attempt`` (the delivery log)
audit events                   ``audit_event`` rows recorded in the range, counted by subtype
=============================  ===========================================================================

Definitions:

* **Evidence time** of a Flag: among the Observation versions its first version cites, the latest of
  each one's ``issued`` instant, or — when that version has no ``issued`` — the time the result first
  arrived here (``last_updated`` of its version 1). Flags citing no Observation have no result → Flag time.
* **Percentiles** are nearest-rank: the p-th percentile of n sorted values is the value at 1-based rank
  ceil(p/100 × n). The median is the 50th percentile by the same rule, so for an even n it is the lower
  of the two middle values, and every figure is a time that actually occurred.
* **Burden** per 1000 results = cohort size × 1000 / results stored; per patient-day = cohort size /
  patient-days. Both are None when their denominator is zero.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from typing import Any

from service.fhir.render import CAUTION, fhir_instant
from service.vocabulary import PRIORITY_DISPLAY, priority_code

__all__ = [
    "AckFact",
    "EscalationFact",
    "EvidenceFact",
    "FlagLine",
    "FlagVersionFact",
    "Latency",
    "Notifications",
    "OutboxFact",
    "ResultFact",
    "Summary",
    "SummaryFacts",
    "flag_lines",
    "nearest_rank",
    "parse_instant",
    "summarise",
    "summary_json",
]


# ---------------------------------------------------------------------------------------------- facts


@dataclass(frozen=True, slots=True)
class FlagVersionFact:
    """One served version of a Flag (``fhir_version``), with the Flag's internal patient key."""

    flag_id: str
    version_id: int
    written_at: datetime  # last_updated of this version
    rule: str
    priority: str  # high | medium | low
    status: str
    patient_key: str
    period_start: datetime
    evidence: tuple[str, ...]  # version-specific references, e.g. "Observation/<id>/_history/<v>"
    sentence: str = ""  # Flag.code.text
    period_end: datetime | None = None
    subject: str = ""  # Flag.subject as served: a reference, else identifier "system|value"


@dataclass(frozen=True, slots=True)
class EvidenceFact:
    """One Observation version a Flag cites."""

    reference: str  # "Observation/<id>/_history/<v>"
    issued: datetime | None  # that version's issued, if it had one
    arrived: datetime  # last_updated of the Observation's version 1
    value: str | None = None  # valueQuantity.value as the feed wrote it (118, 118.0 and 1.18e2 stay apart)
    unit: str | None = None  # valueQuantity.unit (else .code) as the feed sent it
    effective: datetime | None = None  # collection time (orders the cited results)


@dataclass(frozen=True, slots=True)
class ResultFact:
    """A result as first stored (Observation version 1)."""

    observation_id: str
    patient_key: str
    stored_at: datetime
    not_evaluated: str | None = None  # why no rule can read its current version (a coverage code), if so


@dataclass(frozen=True, slots=True)
class AckFact:
    """The first acknowledgement of a Flag."""

    flag_id: str
    acknowledged_at: datetime
    by: str = ""  # who acknowledged: "person (client)" when a person was named, else the client
    note: str | None = None


@dataclass(frozen=True, slots=True)
class EscalationFact:
    flag_id: str
    round: int
    escalated_at: datetime


@dataclass(frozen=True, slots=True)
class OutboxFact:
    """An outbox row and how many tries the delivery log holds for it."""

    event_id: int
    kind: str  # handshake | heartbeat | event-notification
    status: str  # pending | sent | failed
    created_at: datetime
    attempts: int  # delivery_attempt rows for this outbox row


@dataclass(frozen=True)
class SummaryFacts:
    """Plain rows for :func:`summarise`. The loader may hand over more than the range; the summary filters.

    ``audit_counts`` is the exception: it arrives already counted over [start, end) by subtype.
    """

    flag_versions: Sequence[FlagVersionFact] = ()
    evidence: Sequence[EvidenceFact] = ()
    results: Sequence[ResultFact] = ()
    first_acks: Sequence[AckFact] = ()
    escalations: Sequence[EscalationFact] = ()
    outbox: Sequence[OutboxFact] = ()
    audit_counts: Mapping[str, int] = field(default_factory=dict)
    # Results not stored because their code looked like a watched one sent wrong, per client, over
    # [start, end) (already counted, like audit_counts).
    suspect_drops: Mapping[str, int] = field(default_factory=dict)


# -------------------------------------------------------------------------------------------- figures


@dataclass(frozen=True, slots=True)
class FlagLine:
    """One Flag of the cohort, as the export writes it."""

    flag_id: str
    rule: str
    priority: str  # as raised (first version): high | medium | low
    status: str  # of the newest version
    patient_key: str
    raised_at: datetime  # first version written
    evidence_at: datetime | None
    evidence_source: str | None  # "issued" | "arrived"
    seconds_result_to_flag: float | None
    first_acknowledged_at: datetime | None
    seconds_flag_to_ack: float | None
    escalations: int
    current_priority: str = ""  # of the newest version
    sentence_as_raised: str = ""
    sentence_latest: str = ""
    value: str | None = None  # of the latest-collected result the first version cites, as sent
    unit: str | None = None
    acknowledged_by: str | None = None  # first acknowledgement
    acknowledgement_note: str | None = None
    closed_at: datetime | None = None  # period end of the newest version, when it is not active
    closed_why: str | None = None
    evidence: tuple[str, ...] = ()  # the first version's evidence references
    subject: str = ""  # the patient as the Flag names it (a reference or identifier sent by the feed)


@dataclass(frozen=True, slots=True)
class Latency:
    """Nearest-rank median and 90th percentile of some durations, in seconds."""

    count: int
    median_seconds: float | None
    p90_seconds: float | None

    @property
    def median_minutes(self) -> float | None:
        return None if self.median_seconds is None else self.median_seconds / 60

    @property
    def p90_minutes(self) -> float | None:
        return None if self.p90_seconds is None else self.p90_seconds / 60


@dataclass(frozen=True, slots=True)
class Notifications:
    rows: int  # outbox rows created in the range
    delivered: int  # status sent
    retried: int  # more than one try in the delivery log
    failed: int  # given up
    pending: int
    attempts: int  # tries in all


@dataclass(frozen=True)
class Summary:
    start: datetime
    end: datetime
    flags_raised: int
    by_rule: dict[str, int]
    by_priority: dict[str, int]
    results_stored: int
    patient_days: int
    flags_per_1000_results: float | None
    flags_per_patient_day: float | None
    result_to_flag: Latency
    flag_to_ack: Latency
    unacknowledged: int
    escalations: int
    flags_escalated: int
    notifications: Notifications
    audit_events: dict[str, int]
    lines: tuple[FlagLine, ...]
    not_evaluated: dict[str, int] = field(default_factory=dict)  # results stored in the range, by reason
    suspect_drops: dict[str, int] = field(default_factory=dict)  # per client: see SummaryFacts


# ------------------------------------------------------------------------------------------ computing


def nearest_rank(values: Sequence[float], p: float) -> float | None:
    """The p-th percentile (0 < p <= 100) by nearest rank; None for no values."""
    if not 0 < p <= 100:
        raise ValueError("p must be in (0, 100]")
    if not values:
        return None
    ordered = sorted(values)
    return ordered[max(math.ceil(p / 100 * len(ordered)), 1) - 1]


def _latency(values: Sequence[float]) -> Latency:
    return Latency(len(values), nearest_rank(values, 50), nearest_rank(values, 90))


def _within(t: datetime, start: datetime, end: datetime) -> bool:
    return start <= t < end


def _evidence_time(refs: Sequence[str], known: Mapping[str, EvidenceFact]) -> tuple[datetime, str] | None:
    """The latest evidence time among the cited Observation versions (issued, else arrival)."""
    times = []
    for ref in refs:
        fact = known.get(ref)
        if fact is not None:
            times.append((fact.issued, "issued") if fact.issued is not None else (fact.arrived, "arrived"))
    return max(times, key=lambda t: t[0]) if times else None


def _shown_result(refs: Sequence[str], known: Mapping[str, EvidenceFact]) -> EvidenceFact | None:
    """The latest-collected cited result with a value: the one a Flag's value and unit are taken from."""
    cited = [f for ref in refs if (f := known.get(ref)) is not None and f.value is not None]
    return max(cited, key=lambda f: (f.effective or f.arrived, f.reference)) if cited else None


def _closed_why(versions: Sequence[FlagVersionFact]) -> str | None:
    """Why the newest version is not active, in words (None while it is active)."""
    newest = versions[-1]
    if newest.status == "entered-in-error":
        return "withdrawn: the results it rested on were entered in error"
    if newest.status != "inactive":
        return None
    if len(versions) == 1:
        return "raised closed: a late result judged in its own past window"
    return "closed: the rule no longer finds it"


def flag_lines(facts: SummaryFacts, *, start: datetime, end: datetime) -> list[FlagLine]:
    """The cohort: one line per Flag whose first version was written in [start, end), oldest first."""
    _check_range(start, end)
    versions: dict[str, list[FlagVersionFact]] = {}
    for v in facts.flag_versions:
        versions.setdefault(v.flag_id, []).append(v)
    known = {e.reference: e for e in facts.evidence}
    acks = {a.flag_id: a for a in facts.first_acks}
    escalated = Counter(e.flag_id for e in facts.escalations)
    lines: list[FlagLine] = []
    for flag_id, vs in versions.items():
        vs.sort(key=lambda v: v.version_id)
        first, newest = vs[0], vs[-1]
        # Without its version 1 a Flag's raising time is unknown: it is left out, not guessed.
        if first.version_id != 1 or not _within(first.written_at, start, end):
            continue
        ev = _evidence_time(first.evidence, known)
        ack = acks.get(flag_id)
        acked = ack.acknowledged_at if ack else None
        shown = _shown_result(first.evidence, known)
        lines.append(FlagLine(
            flag_id=flag_id, rule=first.rule, priority=first.priority, status=newest.status,
            patient_key=first.patient_key, raised_at=first.written_at,
            evidence_at=ev[0] if ev else None, evidence_source=ev[1] if ev else None,
            seconds_result_to_flag=(first.written_at - ev[0]).total_seconds() if ev else None,
            first_acknowledged_at=acked,
            seconds_flag_to_ack=(acked - first.written_at).total_seconds() if acked else None,
            escalations=escalated.get(flag_id, 0),
            current_priority=newest.priority, sentence_as_raised=first.sentence, sentence_latest=newest.sentence,
            value=shown.value if shown else None, unit=shown.unit if shown else None,
            acknowledged_by=ack.by if ack else None, acknowledgement_note=ack.note if ack else None,
            closed_at=newest.period_end if newest.status != "active" else None,
            closed_why=_closed_why(vs), evidence=first.evidence, subject=first.subject,
        ))
    lines.sort(key=lambda line: (line.raised_at, line.flag_id))
    return lines


def summarise(facts: SummaryFacts, *, start: datetime, end: datetime) -> Summary:
    """The figures for [start, end) from plain stored rows (see the module docstring for each source)."""
    lines = flag_lines(facts, start=start, end=end)
    results = [r for r in facts.results if _within(r.stored_at, start, end)]
    patient_days = {(r.patient_key, _utc_date(r.stored_at)) for r in results}
    outbox = [o for o in facts.outbox if _within(o.created_at, start, end)]
    n = len(lines)
    return Summary(
        start=start, end=end, flags_raised=n,
        by_rule=dict(sorted(Counter(line.rule for line in lines).items())),
        by_priority=dict(sorted(Counter(line.priority for line in lines).items())),
        results_stored=len(results), patient_days=len(patient_days),
        flags_per_1000_results=n * 1000 / len(results) if results else None,
        flags_per_patient_day=n / len(patient_days) if patient_days else None,
        result_to_flag=_latency([line.seconds_result_to_flag for line in lines
                                 if line.seconds_result_to_flag is not None]),
        flag_to_ack=_latency([line.seconds_flag_to_ack for line in lines
                              if line.seconds_flag_to_ack is not None]),
        unacknowledged=sum(1 for line in lines if line.first_acknowledged_at is None),
        escalations=sum(line.escalations for line in lines),
        flags_escalated=sum(1 for line in lines if line.escalations),
        notifications=Notifications(
            rows=len(outbox),
            delivered=sum(1 for o in outbox if o.status == "sent"),
            retried=sum(1 for o in outbox if o.attempts > 1),
            failed=sum(1 for o in outbox if o.status == "failed"),
            pending=sum(1 for o in outbox if o.status == "pending"),
            attempts=sum(o.attempts for o in outbox),
        ),
        audit_events=dict(sorted(facts.audit_counts.items())),
        lines=tuple(lines),
        not_evaluated=dict(sorted(Counter(r.not_evaluated for r in results if r.not_evaluated).items())),
        suspect_drops=dict(sorted(facts.suspect_drops.items())),
    )


def _utc_date(t: datetime) -> date:
    return t.astimezone(UTC).date()


def _check_range(start: datetime, end: datetime) -> None:
    if start.tzinfo is None or end.tzinfo is None:
        raise ValueError("start and end must be aware datetimes")
    if end <= start:
        raise ValueError("end must be after start")


# ------------------------------------------------------------------------------------------- output


def _latency_json(lat: Latency) -> dict[str, Any]:
    def minutes(v: float | None) -> float | None:
        return None if v is None else round(v, 2)

    return {"count": lat.count, "median_seconds": lat.median_seconds, "p90_seconds": lat.p90_seconds,
            "median_minutes": minutes(lat.median_minutes), "p90_minutes": minutes(lat.p90_minutes)}


def summary_json(s: Summary) -> dict[str, Any]:
    """The Summary as a JSON object (without the per-Flag lines: the export carries those)."""
    n = s.notifications
    return {
        "start": fhir_instant(s.start),
        "end": fhir_instant(s.end),
        "range": "[start, end): start included, end excluded",
        "flags_raised": s.flags_raised,
        "flags_by_rule": s.by_rule,
        "flags_by_priority": {priority_code(k): v for k, v in s.by_priority.items()},
        "alert_burden": {
            "results_stored": s.results_stored,
            "patient_days": s.patient_days,
            "flags_per_1000_results": s.flags_per_1000_results,
            "flags_per_patient_day": s.flags_per_patient_day,
        },
        "results_not_evaluated": {"count": sum(s.not_evaluated.values()), "by_reason": s.not_evaluated},
        "results_dropped_under_suspect_codes": {"count": sum(s.suspect_drops.values()),
                                                "by_client": s.suspect_drops},
        "result_to_flag": _latency_json(s.result_to_flag),
        "flag_to_acknowledgement": {**_latency_json(s.flag_to_ack), "unacknowledged": s.unacknowledged},
        "escalations": {"count": s.escalations, "flags_escalated": s.flags_escalated},
        "notifications": {"count": n.rows, "delivered": n.delivered, "retried": n.retried,
                          "failed": n.failed, "pending": n.pending, "attempts": n.attempts},
        "audit_events_by_subtype": s.audit_events,
        "definitions": {
            "cohort": "Flags whose first version was written in the range; each counts once, under the "
                      "priority it was raised with",
            "priority": PRIORITY_DISPLAY,
            "notifications": "notifications queued for subscribers in the range (handshakes, heartbeats and "
                             "events), with how many were delivered, retried, given up (failed) or still "
                             "pending, and the delivery tries in all",
            "patient_day": "a distinct (patient, UTC calendar date) with at least one result first stored "
                           "in the range",
            "evidence_time": "latest, among the cited Observation versions, of issued (else first arrival)",
            "percentile": "nearest-rank; median is the 50th percentile by the same rule",
            "not_evaluated": "results stored in the range whose current version no rule can read, by "
                             "reason; a result collected before the look-back window is evaluated in its "
                             "own window and is not counted here",
            "dropped_under_suspect_codes": "results not stored because their code looked like a watched "
                                           "LOINC code sent wrong (check digit, system), per sending client",
        },
        "caution": CAUTION,
    }


def parse_instant(value: str, name: str) -> datetime:
    """``YYYY-MM-DD`` (midnight UTC) or an ISO date-time with an offset, as aware UTC.

    ValueError names the parameter; a date-time without an offset is refused rather than guessed.
    """
    text = value.strip()
    try:
        if "T" not in text:
            d = date.fromisoformat(text)
            return datetime(d.year, d.month, d.day, tzinfo=UTC)
        t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as exc:
        raise ValueError(f"{name}={value!r} is not a date (YYYY-MM-DD) or date-time "
                         "(YYYY-MM-DDThh:mm:ssZ)") from exc
    if t.tzinfo is None:
        raise ValueError(f"{name}={value!r} needs a UTC offset, e.g. Z")
    return t.astimezone(UTC)
