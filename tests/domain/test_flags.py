"""The flag lifecycle: create, update, close, withdraw; one active flag per patient-rule episode."""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

from datetime import datetime

from service.domain.findings import Finding, Priority, Rule
from service.domain.flags import CloseFlag, CreateFlag, OpenFlag, UpdateFlag, WithdrawFlag, reconcile
from service.domain.rules import evaluate
from service.policy import load_policy
from tests.domain.test_support import PATIENT, at, na, timeline

POLICY = load_policy()
NOW = at(10)


def finding(evidence: tuple[str, ...] = ("Observation/a/_history/1",), value: float = 118.0, onset: datetime | None = None) -> Finding:
    return Finding.of(
        rule=Rule.SODIUM_CRITICAL_LOW,
        patient=PATIENT,
        priority=Priority.HIGH,
        evidence=evidence,
        numbers={"value": value, "limit": 120.0},
        sentence=f"Sodium {value:g} mmol/L, at or below the critical limit of 120 mmol/L.",
        onset=onset or at(0),
    )


def open_flag(f: Finding, flag_id: str = "flag-1") -> OpenFlag:
    return OpenFlag(
        id=flag_id,
        patient=f.patient,
        rule=f.rule,
        episode=f.episode,
        evidence=f.evidence,
        numbers=f.numbers,
        sentence=f.sentence,
        priority=f.priority,
        period_start=f.onset,
        encounter=f.encounter,
    )


def test_a_new_finding_creates_a_flag() -> None:
    f = finding()
    assert reconcile([f], [], set(), NOW) == [CreateFlag(f)]


def test_an_unchanged_finding_changes_nothing() -> None:
    f = finding()
    assert reconcile([f], [open_flag(f)], set(), NOW) == []


def test_new_evidence_updates_the_open_flag() -> None:
    before = finding()
    after = finding(evidence=("Observation/b/_history/1",), value=117.0)
    flag = open_flag(before)
    assert reconcile([after], [flag], set(), NOW) == [UpdateFlag(flag, after)]


def test_a_finding_that_is_gone_closes_its_flag_at_now() -> None:
    flag = open_flag(finding())
    assert reconcile([], [flag], set(), NOW) == [CloseFlag(flag, NOW)]


def test_a_flag_whose_only_result_was_withdrawn_is_withdrawn() -> None:
    flag = open_flag(finding())
    assert reconcile([], [flag], {"Observation/a/_history/1"}, NOW) == [WithdrawFlag(flag, NOW)]


def test_withdrawal_matches_a_bare_observation_id_or_a_versionless_reference() -> None:
    flag = open_flag(finding(evidence=("Observation/a/_history/1", "Observation/b/_history/2")))
    assert reconcile([], [flag], {"a", "Observation/b"}, NOW) == [WithdrawFlag(flag, NOW)]


def test_a_flag_with_one_result_left_standing_is_closed_not_withdrawn() -> None:
    flag = open_flag(finding(evidence=("Observation/a/_history/1", "Observation/b/_history/1")))
    assert reconcile([], [flag], {"a"}, NOW) == [CloseFlag(flag, NOW)]


def test_a_flag_whose_insulin_administration_was_withdrawn_is_withdrawn() -> None:
    f = Finding.of(
        rule=Rule.HYPOKALEMIA_ON_INSULIN,
        patient=PATIENT,
        priority=Priority.MEDIUM,
        evidence=("Observation/k1/_history/1", "MedicationAdministration/m1/_history/1"),
        numbers={"potassium": 3.2},
        sentence="Potassium 3.2 mmol/L, below 3.5 mmol/L, while insulin is being given.",
        onset=at(0),
    )
    flag = open_flag(f)
    assert reconcile([], [flag], {"MedicationAdministration/m1"}, NOW) == [WithdrawFlag(flag, NOW)]


def test_a_new_episode_closes_the_old_flag_and_creates_another() -> None:
    old = open_flag(finding(onset=at(0)))
    new = finding(onset=at(6), evidence=("Observation/c/_history/1",))
    # Ordered by episode: the old one closes before the new one is raised.
    assert reconcile([new], [old], set(), NOW) == [CloseFlag(old, NOW), CreateFlag(new)]


def test_an_episode_rekeyed_by_a_late_earlier_result_continues_the_same_flag() -> None:
    # The open flag rests on result a; a late, earlier result b moves the onset back, and the new
    # finding still cites a: the same episode, so one flag with a new version, not close + create.
    old = open_flag(finding(onset=at(6), evidence=("Observation/a/_history/1",)))
    moved = finding(onset=at(2), evidence=("Observation/a/_history/1", "Observation/b/_history/1"))
    assert reconcile([moved], [old], set(), NOW) == [UpdateFlag(old, moved)]


def test_a_duplicate_open_flag_for_one_episode_is_closed() -> None:
    f = finding()
    keep, duplicate = open_flag(f, "flag-1"), open_flag(f, "flag-2")
    assert reconcile([f], [duplicate, keep], set(), NOW) == [CloseFlag(duplicate, NOW)]


def test_changes_come_in_the_same_order_whatever_the_input_order() -> None:
    a = finding(onset=at(0))
    b = Finding.of(
        rule=Rule.GLUCOSE_CRITICAL_HIGH,
        patient=PATIENT,
        priority=Priority.HIGH,
        evidence=("Observation/g/_history/1",),
        numbers={"value": 30.0},
        sentence="Glucose 30 mmol/L, at or above the critical limit of 25 mmol/L.",
        onset=at(1),
    )
    gone = open_flag(finding(onset=at(-5)), "flag-9")
    assert reconcile([a, b], [gone], set(), NOW) == reconcile([b, a], [gone], set(), NOW)


def test_round_trip_from_results_to_flags_closes_when_sodium_recovers() -> None:
    low = na(118, 0)
    [f] = evaluate(timeline([low]), POLICY, at(1))
    [created] = reconcile([f], [], set(), at(1))
    assert isinstance(created, CreateFlag)
    flag = open_flag(created.finding)
    # 3 mmol/L in 12 h: neither critical nor a fast or projected rise
    recovered = evaluate(timeline([low, na(121, 12)]), POLICY, at(13))
    assert reconcile(recovered, [flag], set(), at(13)) == [CloseFlag(flag, at(13))]


def test_round_trip_withdraws_when_the_only_result_is_entered_in_error() -> None:
    low = na(118, 0)
    [f] = evaluate(timeline([low]), POLICY, at(1))
    flag = open_flag(f)
    after = evaluate(timeline([]), POLICY, at(2))  # the timeline no longer holds the withdrawn result
    assert reconcile(after, [flag], {low.observation_id}, at(2)) == [WithdrawFlag(flag, at(2))]


def test_priority_maps_to_fhir_flag_priority_codes() -> None:
    # FHIR flag-priority-code (fhir-notes §3): PH / PM / PL
    assert [p.flag_priority_code for p in Priority] == ["PH", "PM", "PL"]
