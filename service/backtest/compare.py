"""The side-by-side figures of a backtest, from the simulated Flags of each policy. Pure.

Definitions (the same as ``$summary``'s, service.summary):

* A Flag counts in the range [start, end) of the simulated moment it was **first raised**, once,
  under the priority it was **raised** with (columns say "raised priority").
* Results stored = stored results that arrived in the range; patient-days = distinct (patient, UTC date of
  arrival) among them. Per 1000 results = Flags × 1000 / results stored; per patient-day = Flags /
  patient-days; None when the denominator is zero.
* Result → Flag = raising moment − the latest ``issued`` (else arrival) of the Observation versions the
  Flag first cited. Median and p90 are **nearest-rank** (service.summary.nearest_rank).
* Gained = a Flag (patient, rule, episode) the candidate raises in the range and the baseline never
  raised; lost = the reverse.
* Escalations = rounds that would have been sent in the range had **nobody acknowledged any Flag**
  (counted by the engine from the range's start).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime

from service.backtest.engine import SimFlag
from service.summary import nearest_rank
from service.vocabulary import priority_code

__all__ = ["Comparison", "Difference", "PolicyFigures", "RuleRow", "burden_denominators", "compare", "figures"]


@dataclass(frozen=True, slots=True)
class RuleRow:
    rule: str
    priority: str  # PH | PM | PL, as raised
    flags: int
    patients: int
    per_1000_results: float | None
    per_patient_day: float | None
    median_seconds: float | None
    p90_seconds: float | None
    escalations: int


@dataclass(frozen=True, slots=True)
class PolicyFigures:
    name: str  # "baseline" | "candidate"
    policy_hash: str
    flags: tuple[SimFlag, ...]  # raised in the range, oldest first
    rows: tuple[RuleRow, ...]  # per (rule, raised priority), plus no total row
    total: RuleRow  # rule "all", priority "all"
    per_day: dict[date, int]  # Flags raised per UTC date
    escalations: int


@dataclass(frozen=True, slots=True)
class Difference:
    change: str  # gained | lost
    flag: SimFlag


@dataclass(frozen=True, slots=True)
class Comparison:
    start: datetime
    end: datetime
    results_stored: int
    patient_days: int
    evaluations: int
    baseline: PolicyFigures
    candidate: PolicyFigures
    differences: tuple[Difference, ...]


def _in(t: datetime, start: datetime, end: datetime) -> bool:
    return start <= t < end


def _row(rule: str, priority: str, flags: Sequence[SimFlag], results: int, patient_days: int,
         start: datetime, end: datetime) -> RuleRow:
    latencies = [f.seconds_result_to_flag for f in flags if f.seconds_result_to_flag is not None]
    n = len(flags)
    return RuleRow(
        rule=rule, priority=priority, flags=n, patients=len({f.patient for f in flags}),
        per_1000_results=n * 1000 / results if results else None,
        per_patient_day=n / patient_days if patient_days else None,
        median_seconds=nearest_rank(latencies, 50), p90_seconds=nearest_rank(latencies, 90),
        escalations=sum(f.escalations for f in flags),
    )


def figures(name: str, policy_hash: str, flags: Iterable[SimFlag], *, results: int, patient_days: int,
            start: datetime, end: datetime) -> PolicyFigures:
    cohort = sorted((f for f in flags if _in(f.raised_at, start, end)),
                    key=lambda f: (f.raised_at, f.patient, f.rule, f.episode))
    groups: dict[tuple[str, str], list[SimFlag]] = {}
    for f in cohort:
        groups.setdefault((f.rule, priority_code(f.raised_priority)), []).append(f)
    rows = tuple(_row(rule, prio, groups[(rule, prio)], results, patient_days, start, end)
                 for rule, prio in sorted(groups))
    total = _row("all", "all", cohort, results, patient_days, start, end)
    per_day = Counter(f.raised_at.astimezone(UTC).date() for f in cohort)
    return PolicyFigures(name=name, policy_hash=policy_hash, flags=tuple(cohort), rows=rows, total=total,
                         per_day=dict(sorted(per_day.items())), escalations=total.escalations)


def burden_denominators(stored: Iterable[datetime], start: datetime, end: datetime) -> tuple[int, int]:
    """One patient's (results stored, patient-days) in [start, end) from its results' arrival times."""
    arrivals = [t for t in stored if _in(t, start, end)]
    return len(arrivals), len({t.astimezone(UTC).date() for t in arrivals})


def compare(*, baseline: Sequence[SimFlag], candidate: Sequence[SimFlag], hashes: tuple[str, str],
            results: int, patient_days: int, evaluations: int, start: datetime,
            end: datetime) -> Comparison:
    """Both policies' figures over [start, end) and the Flags one raises and the other does not
    (``results`` and ``patient_days``: see :func:`burden_denominators`)."""
    base = figures("baseline", hashes[0], baseline, results=results, patient_days=patient_days,
                   start=start, end=end)
    cand = figures("candidate", hashes[1], candidate, results=results, patient_days=patient_days,
                   start=start, end=end)
    # Keyed over all simulated Flags, not only the range: a Flag the baseline raised just before the
    # range is not "gained" because the candidate raised it a moment later, inside it.
    base_keys = {f.key for f in baseline}
    cand_keys = {f.key for f in candidate}
    differences = [Difference("gained", f) for f in cand.flags if f.key not in base_keys]
    differences += [Difference("lost", f) for f in base.flags if f.key not in cand_keys]
    differences.sort(key=lambda d: (d.flag.raised_at, d.flag.patient, d.flag.rule, d.change))
    return Comparison(start=start, end=end, results_stored=results, patient_days=patient_days,
                      evaluations=evaluations, baseline=base, candidate=cand, differences=tuple(differences))
