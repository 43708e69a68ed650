"""The informatics summary as a pure function of hand-made rows: every expected figure is counted by hand."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

import pytest

from service.fhir.render import CAUTION
from service.summary import (
    AckFact,
    EscalationFact,
    EvidenceFact,
    FlagVersionFact,
    OutboxFact,
    ResultFact,
    SummaryFacts,
    nearest_rank,
    parse_instant,
    summarise,
    summary_json,
)

START = datetime(2026, 3, 1, tzinfo=UTC)
END = datetime(2026, 3, 3, tzinfo=UTC)


def at(day: int, hour: int, minute: int = 0, second: int = 0) -> datetime:
    return datetime(2026, 3, day, hour, minute, second, tzinfo=UTC)


def version(flag_id: str, written: datetime, *, v: int = 1, rule: str = "sodium-critical-low",
            priority: str = "high", status: str = "active", patient: str = "pk-1",
            evidence: tuple[str, ...] = ()) -> FlagVersionFact:
    return FlagVersionFact(flag_id=flag_id, version_id=v, written_at=written, rule=rule, priority=priority,
                           status=status, patient_key=patient, period_start=written - timedelta(hours=1),
                           evidence=evidence)


def obs(n: int, v: int = 1) -> str:
    return f"Observation/o{n}/_history/{v}"


# ------------------------------------------------------------------------------------ percentiles


def test_nearest_rank_median_of_an_odd_count_is_the_middle_value() -> None:
    assert nearest_rank([50, 10, 30, 20, 40], 50) == 30


def test_nearest_rank_median_of_an_even_count_is_the_lower_middle_value() -> None:
    # ceil(0.5 x 4) = rank 2 of [10, 20, 30, 40]
    assert nearest_rank([40, 10, 30, 20], 50) == 20


def test_nearest_rank_p90_of_ten_values_is_the_ninth() -> None:
    assert nearest_rank([float(v) for v in range(10, 0, -1)], 90) == 9.0


def test_nearest_rank_p90_of_five_values_is_the_largest() -> None:
    # ceil(0.9 x 5) = 5
    assert nearest_rank([1, 2, 3, 4, 5], 90) == 5


def test_nearest_rank_of_nothing_is_none() -> None:
    assert nearest_rank([], 90) is None


# -------------------------------------------------------------------------------------- the cohort


def test_a_flag_counts_in_the_range_of_its_first_version_only() -> None:
    facts = SummaryFacts(flag_versions=[
        version("before", at(1, 0) - timedelta(seconds=1)),  # raised before the range …
        version("before", at(1, 6), v=2),                     # … updated inside it: not counted
        version("first", at(1, 8)),
        version("first", at(4, 8), v=2, status="inactive"),   # a later version does not move it
    ])
    s = summarise(facts, start=START, end=END)
    assert [line.flag_id for line in s.lines] == ["first"]


def test_range_includes_its_start_and_excludes_its_end() -> None:
    facts = SummaryFacts(flag_versions=[version("at-start", START), version("at-end", END),
                                        version("just-before-end", END - timedelta(microseconds=1))])
    lines = summarise(facts, start=START, end=END).lines
    assert [line.flag_id for line in lines] == ["at-start", "just-before-end"]


def test_flags_are_counted_by_rule_and_by_priority() -> None:
    facts = SummaryFacts(flag_versions=[
        version("a", at(1, 1), rule="sodium-critical-low", priority="high"),
        version("b", at(1, 2), rule="sodium-critical-low", priority="high"),
        version("c", at(1, 3), rule="potassium-critical-high", priority="high"),
        version("d", at(2, 3), rule="sodium-rise-too-fast", priority="medium"),
    ])
    s = summarise(facts, start=START, end=END)
    assert s.flags_raised == 4
    assert s.by_rule == {"potassium-critical-high": 1, "sodium-critical-low": 2, "sodium-rise-too-fast": 1}
    assert s.by_priority == {"high": 3, "medium": 1}


def test_a_flag_keeps_the_priority_it_was_raised_with_and_shows_its_newest_status() -> None:
    facts = SummaryFacts(flag_versions=[version("a", at(1, 1), priority="medium"),
                                        version("a", at(1, 5), v=2, priority="high", status="inactive")])
    (line,) = summarise(facts, start=START, end=END).lines
    assert (line.priority, line.status) == ("medium", "inactive")


# ---------------------------------------------------------------------------------------- burden


def _results() -> list[ResultFact]:
    return [
        ResultFact("r1", "pk-1", at(1, 8)),
        ResultFact("r2", "pk-1", at(1, 20)),        # same patient, same UTC date: one patient-day
        ResultFact("r3", "pk-1", at(2, 0, 0, 1)),   # next UTC date: a second patient-day
        ResultFact("r4", "pk-2", at(2, 9)),
        ResultFact("r5", "pk-2", START),            # at the start: inside
        ResultFact("late", "pk-3", END),            # at the end: outside
        ResultFact("early", "pk-3", START - timedelta(seconds=1)),
    ]


def test_results_stored_and_patient_days_count_only_the_range() -> None:
    s = summarise(SummaryFacts(results=_results()), start=START, end=END)
    # r1..r5; patient-days (pk-1, 1 Mar), (pk-1, 2 Mar), (pk-2, 2 Mar), (pk-2, 1 Mar)
    assert (s.results_stored, s.patient_days) == (5, 4)


def test_burden_is_flags_per_thousand_results_and_per_patient_day() -> None:
    facts = SummaryFacts(results=_results(), flag_versions=[version("a", at(1, 9)), version("b", at(2, 10))])
    s = summarise(facts, start=START, end=END)
    assert s.flags_per_1000_results == pytest.approx(2 * 1000 / 5)  # 400.0
    assert s.flags_per_patient_day == pytest.approx(2 / 4)          # 0.5


def test_burden_is_none_without_results() -> None:
    s = summarise(SummaryFacts(flag_versions=[version("a", at(1, 9))]), start=START, end=END)
    assert (s.flags_per_1000_results, s.flags_per_patient_day) == (None, None)


def test_patient_days_are_utc_dates_whatever_the_offset_of_the_time() -> None:
    plus_two = datetime(2026, 3, 2, 1, 0, tzinfo=UTC).astimezone(timezone(timedelta(hours=2)))
    facts = SummaryFacts(results=[ResultFact("a", "pk-1", at(1, 23)), ResultFact("b", "pk-1", plus_two)])
    # 1 Mar 23:00Z and 2 Mar 01:00Z (written as 03:00+02:00) are two UTC dates
    assert summarise(facts, start=START, end=END).patient_days == 2


# ------------------------------------------------------------------------------------- latencies


def test_result_to_flag_runs_from_the_latest_cited_result_using_issued_else_arrival() -> None:
    facts = SummaryFacts(
        flag_versions=[version("a", at(1, 10), evidence=(obs(1), obs(2)))],
        evidence=[EvidenceFact(obs(1), issued=at(1, 9, 0), arrived=at(1, 9, 1)),
                  EvidenceFact(obs(2), issued=None, arrived=at(1, 9, 55))],  # later, by arrival
    )
    (line,) = summarise(facts, start=START, end=END).lines
    assert (line.evidence_at, line.evidence_source) == (at(1, 9, 55), "arrived")
    assert line.seconds_result_to_flag == 300.0


def test_issued_is_preferred_to_arrival_for_the_same_result() -> None:
    facts = SummaryFacts(flag_versions=[version("a", at(1, 10), evidence=(obs(1),))],
                         evidence=[EvidenceFact(obs(1), issued=at(1, 9, 30), arrived=at(1, 9, 58))])
    (line,) = summarise(facts, start=START, end=END).lines
    assert (line.evidence_source, line.seconds_result_to_flag) == ("issued", 1800.0)


def test_only_the_first_versions_evidence_times_the_flag() -> None:
    facts = SummaryFacts(flag_versions=[version("a", at(1, 10), evidence=(obs(1),)),
                                        version("a", at(1, 12), v=2, evidence=(obs(1), obs(2)))],
                         evidence=[EvidenceFact(obs(1), None, at(1, 9)),
                                   EvidenceFact(obs(2), None, at(1, 11, 59))])
    assert summarise(facts, start=START, end=END).lines[0].seconds_result_to_flag == 3600.0


def test_result_to_flag_median_and_p90_by_hand() -> None:
    # Five flags raised 60, 120, 180, 600 and 3000 s after their result.
    delays = [600, 60, 3000, 180, 120]
    versions, evidence = [], []
    for i, d in enumerate(delays):
        raised = at(1, 10 + i)
        versions.append(version(f"f{i}", raised, evidence=(obs(i),)))
        evidence.append(EvidenceFact(obs(i), issued=raised - timedelta(seconds=d), arrived=raised))
    s = summarise(SummaryFacts(flag_versions=versions, evidence=evidence), start=START, end=END)
    # sorted 60 120 180 600 3000: median rank ceil(2.5)=3 → 180; p90 rank ceil(4.5)=5 → 3000
    lat = s.result_to_flag
    assert (lat.count, lat.median_seconds, lat.p90_seconds) == (5, 180.0, 3000.0)
    assert (s.result_to_flag.median_minutes, s.result_to_flag.p90_minutes) == (3.0, 50.0)


def test_a_flag_citing_no_known_result_has_no_result_to_flag_time() -> None:
    cited = ("MedicationAdministration/m1/_history/1",)
    facts = SummaryFacts(flag_versions=[version("a", at(1, 10), evidence=cited)])
    s = summarise(facts, start=START, end=END)
    assert s.lines[0].seconds_result_to_flag is None
    assert (s.result_to_flag.count, s.result_to_flag.median_seconds) == (0, None)


def test_flag_to_acknowledgement_median_p90_and_the_unacknowledged() -> None:
    raised = [at(1, 10), at(1, 11), at(1, 12), at(1, 13), at(1, 14)]
    acks = [AckFact("f0", raised[0] + timedelta(minutes=2)), AckFact("f1", raised[1] + timedelta(minutes=10)),
            AckFact("f2", raised[2] + timedelta(minutes=4)), AckFact("f3", raised[3] + timedelta(minutes=30))]
    facts = SummaryFacts(flag_versions=[version(f"f{i}", t) for i, t in enumerate(raised)], first_acks=acks)
    s = summarise(facts, start=START, end=END)
    # sorted 120 240 600 1800 s: median rank 2 → 240; p90 rank ceil(3.6)=4 → 1800
    lat = s.flag_to_ack
    assert (lat.count, lat.median_seconds, lat.p90_seconds) == (4, 240.0, 1800.0)
    assert s.unacknowledged == 1


# ---------------------------------------------------------------------- escalations, notifications


def test_escalations_are_counted_for_the_cohort_and_per_flag() -> None:
    facts = SummaryFacts(
        flag_versions=[version("a", at(1, 10)), version("b", at(1, 11)), version("c", at(1, 12)),
                       version("old", at(1, 0) - timedelta(hours=1))],
        escalations=[EscalationFact("a", 1, at(1, 10, 15)), EscalationFact("a", 2, at(1, 10, 30)),
                     EscalationFact("b", 1, at(1, 11, 15)), EscalationFact("old", 1, at(1, 0, 15))],
    )
    s = summarise(facts, start=START, end=END)
    assert (s.escalations, s.flags_escalated) == (3, 2)
    assert {line.flag_id: line.escalations for line in s.lines} == {"a": 2, "b": 1, "c": 0}


def test_notifications_delivered_retried_failed_and_attempts() -> None:
    outbox = [
        OutboxFact(1, "handshake", "sent", at(1, 1), attempts=1),
        OutboxFact(2, "event-notification", "sent", at(1, 2), attempts=3),    # delivered after retries
        OutboxFact(3, "event-notification", "failed", at(1, 3), attempts=5),  # given up
        OutboxFact(4, "event-notification", "pending", at(2, 3), attempts=0),
        OutboxFact(5, "event-notification", "sent", END, attempts=2),         # outside the range
    ]
    n = summarise(SummaryFacts(outbox=outbox), start=START, end=END).notifications
    assert (n.rows, n.delivered, n.retried, n.failed, n.pending, n.attempts) == (4, 2, 2, 1, 1, 9)


# ------------------------------------------------------------------------------------ input, output


def test_the_json_carries_the_caution() -> None:
    assert summary_json(summarise(SummaryFacts(), start=START, end=END))["caution"] == CAUTION


def test_the_json_names_no_patient() -> None:
    facts = SummaryFacts(flag_versions=[version("a", at(1, 10), patient="pk-secret")],
                         results=[ResultFact("r", "pk-secret", at(1, 9))])
    assert "pk-secret" not in str(summary_json(summarise(facts, start=START, end=END)))


def test_an_empty_or_backwards_range_is_refused() -> None:
    with pytest.raises(ValueError):
        summarise(SummaryFacts(), start=END, end=START)


def test_a_date_means_its_utc_midnight() -> None:
    assert parse_instant("2026-03-03", "end") == END


def test_a_date_time_is_read_with_its_offset() -> None:
    assert parse_instant("2026-03-01T08:00:00+02:00", "start") == at(1, 6)


def test_a_date_time_without_an_offset_is_refused() -> None:
    with pytest.raises(ValueError, match="offset"):
        parse_instant("2026-03-01T08:00:00", "start")


# ------------------------------------------------------------------------- results not evaluated


def test_results_stored_but_not_evaluated_are_counted_by_reason_in_the_range() -> None:
    facts = SummaryFacts(results=[
        ResultFact("ok", "pk-1", at(1, 8)),
        ResultFact("blank", "pk-1", at(1, 9), not_evaluated="no-numeric-value"),
        ResultFact("urine", "pk-2", at(1, 10), not_evaluated="urine"),
        ResultFact("urine2", "pk-2", at(2, 10), not_evaluated="urine"),
        ResultFact("before", "pk-2", START - timedelta(seconds=1), not_evaluated="urine"),  # outside
    ])
    s = summarise(facts, start=START, end=END)
    assert s.results_stored == 4
    assert s.not_evaluated == {"no-numeric-value": 1, "urine": 2}
    figure = summary_json(s)["results_not_evaluated"]
    assert figure == {"count": 3, "by_reason": {"no-numeric-value": 1, "urine": 2}}
