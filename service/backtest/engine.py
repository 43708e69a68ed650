"""One patient's stored history re-evaluated under one policy on a simulated clock. Pure.

The same code the live path runs: ``service.domain.rules.evaluate`` → the arrival-delay note →
``service.domain.flags.reconcile``. The clock stands at each moment the live path evaluated this patient:

* every **arrival** (the time a stored version was written; versions written together are judged
  together, as one unit of work was);
* the **time-driven rechecks** that can change a Flag with no new data: while insulin is recorded, a
  tick every ``tick`` (the live scheduler rechecks every minute; a coarser tick only delays a
  time-driven Flag by less than the tick); and, while a Flag is open, the moment each result leaves
  the look-back window.

At each moment the timeline holds what had arrived by then, in the window the live evaluator uses
((now - lookback, now + future tolerance]). The simulated Flags are kept in memory, keyed as the
store keys them — (patient, rule, episode) — so an episode that closes and recurs is one Flag, as it
is one ``flag`` row live.

Escalations are counted as if **nobody acknowledged anything**: an open Flag of an escalated priority
(policy ``[escalation.after_minutes]``) escalates once per interval since its priority began, until it
closes or the run ends. Decision support only.
"""

from __future__ import annotations

import bisect
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta

from service.domain.arrival import Event, note_arrival_delay, note_late, window_before
from service.domain.coverage import unread_exposure, unread_result
from service.domain.findings import Finding, Priority
from service.domain.flags import CloseFlag, CreateFlag, OpenFlag, UpdateFlag, WithdrawFlag, reconcile
from service.domain.rules import evaluate
from service.domain.values import InsulinExposure, LabResult, ResultStatus, Timeline
from service.policy import Policy

__all__ = ["History", "PatientRun", "SimFlag", "simulate"]

_EPSILON = timedelta(microseconds=1)  # a result leaves the window just after effective + lookback


@dataclass(frozen=True, slots=True)
class History:
    """Every stored version of one patient's results and insulin records, each with the time it arrived.

    ``results`` are LabResult versions of any status, their arrival in ``LabResult.arrived`` (required);
    ``replaces`` maps a result version's reference to the result it replaces (observation-replaces);
    ``exposures`` pair each insulin version with its arrival; ``stored`` holds the arrival of each
    result's first version (what ``$summary`` counts as a result stored).
    """

    patient: str
    results: tuple[LabResult, ...] = ()
    replaces: Mapping[str, str] = field(default_factory=dict)
    exposures: tuple[tuple[datetime, InsulinExposure], ...] = ()
    stored: tuple[datetime, ...] = ()
    # The unit of work (received request) that wrote each version, by reference: versions written by one
    # request were judged together, those of two requests at the same instant one after the other.
    units: Mapping[str, int] = field(default_factory=dict)


@dataclass(slots=True)
class SimFlag:
    """One simulated Flag: how it was raised, what became of it, and the escalations it would have sent."""

    patient: str
    rule: str
    episode: str
    raised_at: datetime  # the simulated clock when it was first raised
    raised_priority: Priority
    sentence: str  # as first raised
    evidence_at: datetime | None  # latest issued (else arrival) of the Observation versions it first cited
    priority: Priority  # the newest
    closed_at: datetime | None = None
    closed_how: str | None = None  # "closed" (no longer found) | "withdrawn" (evidence entered in error)
    escalations: int = 0  # rounds that fell in the counting range (simulate's ``count_from`` to its end)
    _id: str = ""
    _since: datetime | None = None  # when its current priority began (escalation rounds count from it)

    @property
    def seconds_result_to_flag(self) -> float | None:
        return None if self.evidence_at is None else (self.raised_at - self.evidence_at).total_seconds()

    @property
    def key(self) -> tuple[str, str, str]:
        return (self.patient, self.rule, self.episode)


@dataclass(frozen=True, slots=True)
class PatientRun:
    patient: str
    flags: tuple[SimFlag, ...]
    evaluations: int  # moments the rules ran


def simulate(history: History, policy: Policy, *, lookback: timedelta, end: datetime,
             tick: timedelta = timedelta(minutes=15), count_from: datetime | None = None) -> PatientRun:
    """Re-evaluate ``history`` under ``policy`` at every moment the live path would have, up to ``end``
    (excluded); returns every Flag raised (including before any reporting range: the caller filters).
    Escalation rounds are counted from ``count_from`` (default: all)."""
    ahead = timedelta(minutes=policy.timing.future_tolerance_minutes)
    late_after = timedelta(minutes=policy.timing.late_note_after_minutes)
    after = _Rounds({p: timedelta(minutes=m) for p, m in policy.escalation.after_minutes.items()}, count_from)
    state = _Store(history, end)
    if not state.arrivals:
        return PatientRun(history.patient, (), 0)
    ticks = _insulin_ticks(state.insulin_from, tick, end)
    ageing = {r.effective + lookback + _EPSILON for r in history.results}
    moments = sorted({*((t, u, 0) for t, u in state.arrivals), *((t, _LAST, 1) for t in ticks),
                      *((t, _LAST, 2) for t in ageing)})
    by_reference = {r.reference: r for r in history.results}

    flags: dict[tuple[str, str, str], SimFlag] = {}
    open_: dict[str, tuple[OpenFlag, SimFlag]] = {}
    evaluations = 0
    last: tuple[datetime, int] | None = None
    for now, unit, kind in moments:
        if now >= end or (now, unit) == last or (now, unit) < state.arrivals[0]:
            continue
        if kind == 2 and not open_:
            continue  # ageing out can only close a Flag
        last = (now, unit)
        evaluations += 1
        arrived = state.advance((now, unit))
        timeline = state.timeline(now - lookback, now + ahead)
        findings = [note_arrival_delay(f, timeline.results, after=late_after)
                    for f in evaluate(timeline, policy, now)]
        _apply(reconcile(findings, [o for o, _ in open_.values()], timeline.withdrawn, now),
               now, flags, open_, by_reference, after)
        late = [x for x in arrived if _late_anchor(x, policy, now - lookback) is not None]
        if late:
            _judge_late(state, late, policy, lookback, now, flags, by_reference)
    for _, sim in open_.values():
        _escalations(sim, end, after)
    return PatientRun(history.patient, tuple(sorted(flags.values(), key=lambda f: (f.raised_at, f.rule))),
                      evaluations)


_LAST = 2**62  # a recheck at an instant runs after every unit of work of that instant
_UNUSABLE = (ResultStatus.ENTERED_IN_ERROR, ResultStatus.CANCELLED, ResultStatus.REGISTERED)


class _Store:
    """What the store held at the simulated moment: the newest arrived version of each record, read as
    ``service.db.timeline`` reads the store."""

    def __init__(self, history: History, end: datetime) -> None:
        self.patient = history.patient
        self.replaces = history.replaces
        units = history.units
        items: list[tuple[tuple[datetime, int], int, LabResult | InsulinExposure]] = [
            ((r.arrived, units.get(r.reference, 0)), 0, r) for r in history.results
            if r.arrived is not None and r.arrived < end]
        items += [((t, units.get(x.reference, 0)), 1, x) for t, x in history.exposures if t < end]
        items.sort(key=lambda i: (i[0], i[1], _version(i[2])))
        self.items = items
        self.arrivals = sorted({at for at, _, _ in items})
        self.insulin_from = min((at[0] for at, kind, _ in items if kind == 1), default=None)
        self.results: dict[str, LabResult] = {}
        self.exposures: dict[str, InsulinExposure] = {}
        self._next = 0
        # The current results' collection times, sorted, with their ids: a window is two bisections.
        self._times: list[datetime] = []
        self._ids: list[str] = []

    def advance(self, now: tuple[datetime, int]) -> list[LabResult | InsulinExposure]:
        """Take in every version arrived by ``now`` (instant, unit of work); returns those that arrived
        since the last call."""
        arrived = []
        while self._next < len(self.items) and self.items[self._next][0] <= now:
            item = self.items[self._next][2]
            if isinstance(item, LabResult):
                previous = self.results.get(item.observation_id)
                if previous is None or previous.effective != item.effective:
                    if previous is not None:
                        self._drop(previous)
                    i = bisect.bisect_right(self._times, item.effective)
                    self._times.insert(i, item.effective)
                    self._ids.insert(i, item.observation_id)
                self.results[item.observation_id] = item
            else:
                self.exposures[item.source_id] = item
            arrived.append(item)
            self._next += 1
        return arrived

    def _drop(self, result: LabResult) -> None:
        i = bisect.bisect_left(self._times, result.effective)
        while self._ids[i] != result.observation_id:
            i += 1
        del self._times[i], self._ids[i]

    def timeline(self, low: datetime, high: datetime) -> Timeline:
        """Current usable results collected in (low, high] and exposures overlapping it."""
        lo, hi = bisect.bisect_right(self._times, low), bisect.bisect_right(self._times, high)
        rows = [self.results[rid] for rid in self._ids[lo:hi]]
        replaced = {self.replaces[r.reference] for r in rows
                    if r.reference in self.replaces and r.status is not ResultStatus.ENTERED_IN_ERROR}
        withdrawn = {f"Observation/{r.observation_id}" for r in rows if r.status is ResultStatus.ENTERED_IN_ERROR}
        results = sorted((r for r in rows if r.status not in _UNUSABLE and r.value is not None
                          and f"Observation/{r.observation_id}" not in replaced and f"id:{r.key}" not in replaced),
                         key=lambda r: r.order_key)
        exposures = []
        for x in sorted(self.exposures.values(), key=lambda x: (x.start, x.source_id)):
            if x.start > high or (x.end is not None and x.end <= low):
                continue
            if x.status == "entered-in-error":
                withdrawn.add(f"MedicationAdministration/{x.source_id}")
            if x.status not in ("entered-in-error", "not-done"):
                exposures.append(x)
        return Timeline(patient=self.patient, window_start=low, window_end=high, results=tuple(results),
                        exposures=tuple(exposures), withdrawn=frozenset(withdrawn))


def _version(item: LabResult | InsulinExposure) -> int:
    return item.version


def _late_anchor(item: LabResult | InsulinExposure, policy: Policy, start: datetime) -> datetime | None:
    """The time a version arriving now is judged at when it is older than the window (as
    service.arrivals.ArrivalReview decides), else None."""
    if isinstance(item, LabResult):
        if unread_result(item, policy) is not None:
            return None
        anchor: datetime | None = item.effective
    else:
        if unread_exposure(item, policy) is not None:
            return None
        anchor = item.end
    return anchor if anchor is not None and anchor <= start else None


def _judge_late(state: _Store, late: Sequence[LabResult | InsulinExposure], policy: Policy, lookback: timedelta,
                now: datetime, flags: dict[tuple[str, str, str], SimFlag],
                by_reference: Mapping[str, LabResult]) -> None:
    """Late versions judged in the window ending at their own time; a finding citing one is a Flag
    written inactive at once, unless a Flag of its episode exists (service.db.flags.write_late_flags)."""
    start = now - lookback
    anchored = [(a, x) for x in late if (a := _late_anchor(x, policy, start)) is not None]
    anchors = sorted({a for a, _ in anchored})
    full = state.timeline(anchors[0] - lookback, anchors[-1])
    by_ref = {x.reference: (a, x) for a, x in anchored}
    found: dict[tuple[str, str], Finding] = {}
    for anchor in anchors:
        ends: Event = "collection" if any(a == anchor and isinstance(x, LabResult) for a, x in anchored) \
            else "insulin-end"
        for finding in evaluate(window_before(full, anchor, lookback), policy, anchor):
            cited = [by_ref[ref] for ref in finding.evidence if ref in by_ref]
            if cited:
                a, first = min(cited, key=lambda c: (not isinstance(c[1], LabResult), now - c[0]))
                of: Event = "collection" if isinstance(first, LabResult) else "insulin-end"
                found[(finding.rule.value, finding.episode)] = note_late(
                    finding, delay=now - a, lookback=lookback, of=of, window_end=ends)
    for (_, _), f in sorted(found.items()):
        key = (f.patient, f.rule.value, f.episode)
        if key not in flags:
            flags[key] = SimFlag(patient=f.patient, rule=f.rule.value, episode=f.episode, raised_at=now,
                                 raised_priority=f.priority, sentence=f.sentence,
                                 evidence_at=_evidence_time(f, by_reference), priority=f.priority,
                                 closed_at=now, closed_how="late: inactive when written",
                                 _id=f"{f.rule.value}|{f.episode}")


def _insulin_ticks(first: datetime | None, tick: timedelta, end: datetime) -> list[datetime]:
    """A recheck every ``tick`` from the first insulin record's arrival to the end: insulin makes time
    alone able to raise a Flag (a potassium recheck falling due)."""
    if first is None:
        return []
    out, t = [], first + tick
    while t < end:
        out.append(t)
        t += tick
    return out


def _apply(changes: Iterable[object], now: datetime, flags: dict[tuple[str, str, str], SimFlag],
           open_: dict[str, tuple[OpenFlag, SimFlag]], by_reference: Mapping[str, LabResult],
           after: _Rounds) -> None:
    for change in changes:
        if isinstance(change, CreateFlag):
            f = change.finding
            key = (f.patient, f.rule.value, f.episode)
            sim = flags.get(key)
            if sim is None:  # a recurring episode reactivates its Flag, as the live store does
                sim = SimFlag(patient=f.patient, rule=f.rule.value, episode=f.episode, raised_at=now,
                              raised_priority=f.priority, sentence=f.sentence,
                              evidence_at=_evidence_time(f, by_reference), priority=f.priority,
                              _id=f"{f.rule.value}|{f.episode}")
                flags[key] = sim
            sim.priority, sim.closed_at, sim.closed_how, sim._since = f.priority, None, None, now
            open_[sim._id] = (_open(sim._id, f), sim)
        elif isinstance(change, UpdateFlag):
            _, sim = open_.pop(change.flag.id)
            f = change.finding
            if f.priority != sim.priority:
                _escalations(sim, now, after)
                sim.priority, sim._since = f.priority, now
            if f.episode != sim.episode:  # an earlier result arrived late: the store re-keys the Flag
                flags.pop(sim.key, None)
                sim.episode = f.episode
                flags[sim.key] = sim
            open_[sim._id] = (_open(sim._id, f), sim)
        elif isinstance(change, CloseFlag | WithdrawFlag):
            _, sim = open_.pop(change.flag.id)
            _escalations(sim, now, after)
            sim.closed_at = now
            sim.closed_how = "closed" if isinstance(change, CloseFlag) else "withdrawn"


def _open(flag_id: str, f: Finding) -> OpenFlag:
    return OpenFlag(id=flag_id, patient=f.patient, rule=f.rule, episode=f.episode, evidence=f.evidence,
                    numbers=f.numbers, sentence=f.sentence, priority=f.priority, period_start=f.onset,
                    encounter=f.encounter)


@dataclass(frozen=True, slots=True)
class _Rounds:
    """Escalation intervals per priority, and where counting starts."""

    interval: Mapping[Priority, timedelta]
    count_from: datetime | None


def _escalations(sim: SimFlag, until: datetime, after: _Rounds) -> None:
    """Add the rounds an unacknowledged Flag would have escalated at its current priority before ``until``
    (round k falls k intervals after its priority began), those before ``count_from`` left out."""
    interval = after.interval.get(sim.priority)
    since, sim._since = sim._since, None
    if interval is None or since is None or until <= since:
        return
    last = -((since - until) // interval) - 1  # the last k with since + k x interval < until
    first = 1 if after.count_from is None or after.count_from <= since \
        else max(1, -((since - after.count_from) // interval))  # the first k at or after count_from
    sim.escalations += max(0, last - first + 1)


def _evidence_time(f: Finding, by_reference: Mapping[str, LabResult]) -> datetime | None:
    """As ``$summary`` defines it: the latest, among the cited Observation versions, of issued (else arrival)."""
    times = [r.issued or r.arrived for ref in f.evidence if (r := by_reference.get(ref)) is not None]
    known = [t for t in times if t is not None]
    return max(known) if known else None
