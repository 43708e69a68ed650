"""What each Flag version says happened, in words. Pure: no I/O, no clock.

A finding's sentence is told from the data alone, so any arrival order of the same results tells it the
same way (tests/test_determinism.py):

- its lead: "Raised" when the finding did not stand just before its newest evidence was collected,
  else "Worse", "Better" or "Unchanged" against the finding then, judged by the rule's measure
  (service.domain.alerting) and priority;
- the previous value of that measure, when there was one;
- when its newest result was collected, in the lab's time zone (in UTC, said so, when none is set).

Versions that the rules do not decide say so before the sentence: resolved (closed), withdrawn, and
(service.evaluation, service.acknowledging) escalated and acknowledged. Decision support only.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from datetime import datetime
from zoneinfo import ZoneInfo

from service.domain.alerting import MEASURES, Worse, measure_of
from service.domain.findings import Finding, Priority, Rule
from service.domain.rules.series import UNITS, fmt
from service.domain.values import Timeline

__all__ = ["LEADS", "closed_lead", "collected_words", "narrate", "untold", "withdrawn_lead"]

LEADS = ("Raised", "Worse", "Better", "Unchanged")
_RANK = {Priority.LOW: 1, Priority.MEDIUM: 2, Priority.HIGH: 3}
# What the measure is called after "previous": a level names its analyte, a change says what changed.
_MEASURE_WORDS = {"rise": "rise", "fall": "fall", "rate_per_hour": "rate"}

Evaluate = Callable[[Timeline], list[Finding]]


def narrate(findings: Sequence[Finding], timeline: Timeline, earlier: Evaluate, zone: ZoneInfo | None) -> list[Finding]:
    """The findings, each sentence led by what happened and closed by the previous value and the
    collection time. ``earlier`` evaluates a timeline (the same rules, policy and now)."""
    at = {r.reference: r.effective for r in timeline.results}
    before: dict[datetime, dict[tuple[Rule, str], Finding]] = {}
    out: list[Finding] = []
    for f in findings:
        times = [at[ref] for ref in f.evidence if ref in at]
        if not times:
            out.append(f)
            continue
        newest = max(times)
        if f.onset >= newest:
            # The episode began with its newest result (its key is that time): nothing earlier held it.
            out.append(_told(f, None, newest, zone))
            continue
        if newest not in before:
            cut = replace(timeline, results=tuple(r for r in timeline.results if r.effective < newest),
                          exposures=tuple(e for e in timeline.exposures if e.start < newest))
            before[newest] = {(g.rule, g.episode): g for g in earlier(cut)}
        out.append(_told(f, before[newest].get((f.rule, f.episode)), newest, zone))
    return out


def _told(f: Finding, prior: Finding | None, newest: datetime, zone: ZoneInfo | None) -> Finding:
    lead, previous = "Raised", ""
    if prior is not None:
        lead = _trend(f, prior)
        value = measure_of(f.rule, prior.numbers)
        if value is not None:
            previous = f"; previous {_measure_words(f.rule)} {fmt(value)} {_unit(f.rule)}"
    # One sentence still: the previous value and the collection time are its last clauses.
    body = f.sentence.removesuffix(".")
    return replace(f, sentence=f"{lead}: {body}{previous}; collected {collected_words(newest, zone)}.")


def _trend(f: Finding, prior: Finding) -> str:
    if _RANK[f.priority] != _RANK[prior.priority]:
        return "Worse" if _RANK[f.priority] > _RANK[prior.priority] else "Better"
    measure = MEASURES.get(f.rule)
    now, then = measure_of(f.rule, f.numbers), measure_of(f.rule, prior.numbers)
    if measure is None or now is None or then is None or now == then:
        return "Unchanged"
    higher = now > then
    return "Worse" if higher == (measure.worse is Worse.HIGHER) else "Better"


def _measure_words(rule: Rule) -> str:
    measure = MEASURES[rule]
    return _MEASURE_WORDS.get(measure.number, measure.analyte.value)


def _unit(rule: Rule) -> str:
    measure = MEASURES[rule]
    unit = UNITS[measure.analyte]
    return f"{unit}/h" if measure.per_hour else unit


def collected_words(when: datetime, zone: ZoneInfo | None) -> str:
    """"2026-03-02 02:00 America/Chicago"; "2026-03-02 08:00 UTC (no lab time zone set)"."""
    if zone is None:
        return f"{when:%Y-%m-%d %H:%M} UTC (no lab time zone set)"
    return f"{when.astimezone(zone):%Y-%m-%d %H:%M} {zone.key}"


def untold(sentence: str) -> str:
    """The sentence without its lead: what a resolved or withdrawn version quotes."""
    lead, sep, rest = sentence.partition(": ")
    return rest if sep and lead in LEADS else sentence


def closed_lead() -> str:
    return "Resolved: no longer found in the latest results; it had said: "


def withdrawn_lead(rule: str, numbers: Mapping[str, float]) -> str:
    """"Withdrawn: the potassium 7.1 mmol/L it rested on was entered in error. It had said: " for a level
    rule (its one result is named); "the results" for the others."""
    what = "the results it rested on were"
    try:
        measure = MEASURES.get(Rule(rule))
    except ValueError:
        measure = None
    if measure is not None and measure.number == "value" and "value" in numbers:
        what = f"the {measure.analyte.value} {fmt(numbers['value'])} {UNITS[measure.analyte]} it rested on was"
    return f"Withdrawn: {what} entered in error. It had said: "
