"""The demo ward: an invented 48 h feed whose flags at the scenario's close are known in advance.

The feed (fixtures/demo/ward.ndjson) is read the way the service reads it: each line is validated
as an R4 resource, triaged, normalised by the service's own functions, versions are resolved per
identifier with the service's own ``decide``, and each patient's timeline is handed to the pure
rules at the close. The flags found must be exactly those fixtures/demo/expected.json lists.
Invented data only; decision support only, thresholds are site policy.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, timedelta
from functools import cache
from pathlib import Path
from typing import Any

import pytest
from fhir.resources.R4B import get_fhir_model_class

from service.domain.catalogue import lookup
from service.domain.findings import Finding, Rule
from service.domain.rules import evaluate
from service.domain.values import (
    Analyte,
    InsulinExposure,
    LabResult,
    ResultStatus,
    Specimen,
    Timeline,
)
from service.domain.versions import Decision, Held, decide
from service.fhir.normalise import (
    IncomingInsulin,
    IncomingObservation,
    loinc_codes,
    normalise_insulin,
    normalise_observation,
)
from service.fhir.triage import Kind, triage
from service.policy import Policy, load_policy

DEMO = Path(__file__).resolve().parents[1] / "fixtures" / "demo"
FEED = DEMO / "ward.ndjson"
EXPECTED = json.loads((DEMO / "expected.json").read_text("utf-8"))

SCENARIO_START = datetime(2026, 3, 1, tzinfo=UTC)
NOW = datetime(2026, 3, 3, tzinfo=UTC)
LOOKBACK = timedelta(hours=72)

# Results that can never feed a rule: withdrawn, never measured, or not yet resulted.
UNUSABLE_RESULTS = {ResultStatus.ENTERED_IN_ERROR, ResultStatus.CANCELLED, ResultStatus.REGISTERED}
UNUSABLE_EXPOSURES = {"entered-in-error", "not-done"}


# --- reading the feed the way the service does -------------------------------------------------


@dataclass
class Current:
    """The version of one identifier that is held after the feed so far."""

    version: int
    held: Held
    incoming: IncomingObservation | IncomingInsulin


@dataclass
class Ward:
    """The feed after triage, normalisation and version resolution."""

    results: list[LabResult] = field(default_factory=list)
    exposures: list[InsulinExposure] = field(default_factory=list)
    patients: set[str] = field(default_factory=set)
    ignored: list[int] = field(default_factory=list)  # line numbers acknowledged and dropped
    decisions: list[tuple[int, Decision]] = field(default_factory=list)  # (line number, fate)

    def timeline(self, patient: str) -> Timeline:
        start = NOW - LOOKBACK
        results = sorted(
            (r for r in self.results if r.patient == patient and start < r.effective <= NOW),
            key=lambda r: (r.effective, r.observation_id),
        )
        exposures = sorted(
            (
                e
                for e in self.exposures
                if e.patient == patient and e.start <= NOW and (e.end is None or e.end > start)
            ),
            key=lambda e: (e.start, e.source_id),
        )
        return Timeline(
            patient=patient,
            window_start=start,
            window_end=NOW,
            results=tuple(results),
            exposures=tuple(exposures),
        )


@cache
def policy() -> Policy:
    return load_policy()


@cache
def lines() -> tuple[dict[str, Any], ...]:
    return tuple(json.loads(line) for line in FEED.read_text("utf-8").splitlines() if line.strip())


def _subject(resource: dict[str, Any]) -> str:
    return str(resource["subject"]["reference"])


def read_ward(feed: Iterable[dict[str, Any]]) -> Ward:
    """Triage, normalise and resolve versions, then keep what may feed the rules."""
    ward = Ward()
    held: dict[tuple[str, str, str], Current] = {}
    codes = policy().insulin.codes_matcher()
    for number, resource in enumerate(feed, start=1):
        rtype = str(resource["resourceType"])
        ward.patients.add(_subject(resource))
        seen = triage(resource, codes)
        if seen.kind is Kind.IGNORED:
            ward.ignored.append(number)
            continue
        incoming: IncomingObservation | IncomingInsulin | None
        if seen.kind is Kind.OBSERVATION:
            assert seen.entry is not None
            incoming = normalise_observation(resource, seen.entry, rtype)
            issued = incoming.issued
        else:
            incoming = normalise_insulin(resource, codes, rtype)
            assert incoming is not None
            issued = None
        key = (rtype, *incoming.identifier)
        before = held.get(key)
        fate = decide(
            before.held if before else None,
            status=incoming.status,
            issued=issued,
            content_hash=incoming.content_hash,
        )
        ward.decisions.append((number, fate))
        if fate in (Decision.CREATE, Decision.UPDATE):
            held[key] = Current(
                version=(before.version + 1) if before else 1,
                held=Held(status=incoming.status, issued=issued, content_hash=incoming.content_hash),
                incoming=incoming,
            )
    for current in held.values():
        item = current.incoming
        if isinstance(item, IncomingObservation):
            status = ResultStatus(item.status)
            if status in UNUSABLE_RESULTS or item.value is None:
                continue
            ward.results.append(
                LabResult(
                    observation_id=item.identifier[1],
                    version=current.version,
                    patient=str(item.subject["reference"]),
                    analyte=item.entry.analyte,
                    specimen=item.entry.specimen,
                    loinc=item.entry.code,
                    status=status,
                    effective=item.effective,
                    value=item.value,
                    comparator=item.comparator,
                    calculated=item.entry.calculated,
                    issued=item.issued,
                    encounter=item.encounter,
                )
            )
        elif item.status not in UNUSABLE_EXPOSURES:
            ward.exposures.append(
                InsulinExposure(
                    source_id=item.identifier[1],
                    version=current.version,
                    patient=str(item.subject["reference"]),
                    start=item.start,
                    end=item.end,
                    route=item.route,
                    status=item.status,
                    medication=item.medication,
                )
            )
    return ward


@cache
def ward() -> Ward:
    return read_ward(lines())


def findings(source: Ward, patient: str) -> list[Finding]:
    return evaluate(source.timeline(patient), policy(), NOW)


def active(source: Ward, patient: str) -> set[str]:
    return {f.rule.value for f in findings(source, patient)}


def expected_rules(patient: str) -> set[str]:
    return set(EXPECTED["patients"][patient]["rules"])


def _without(indices: Sequence[int]) -> list[dict[str, Any]]:
    drop = set(indices)
    return [r for i, r in enumerate(lines()) if i not in drop]


# --- the feed itself ---------------------------------------------------------------------------


def test_every_line_is_a_valid_r4_resource() -> None:
    failures = []
    for number, resource in enumerate(lines(), start=1):
        try:
            get_fhir_model_class(resource["resourceType"]).model_validate(resource)
        except Exception as exc:  # any refusal is a defect of the fixture
            failures.append(f"line {number}: {exc}")
    assert lines(), "the feed is empty"
    assert failures == []


def test_every_watched_line_is_accepted_by_the_service_normalisers() -> None:
    watched = [r for r in lines() if triage(r, policy().insulin.codes_matcher()).kind is not Kind.IGNORED]
    source = ward()
    assert len(source.decisions) == len(watched)
    assert len(watched) + len(source.ignored) == len(lines())


def test_scenario_covers_ten_to_sixteen_patients_named_only_by_ward_ids() -> None:
    patients = ward().patients
    assert 10 <= len(patients) <= 16
    assert all(p.startswith("Patient/ward-") for p in patients)


def test_data_carry_no_names() -> None:
    def keys(node: Any) -> Iterable[str]:
        if isinstance(node, dict):
            for k, v in node.items():
                yield k
                yield from keys(v)
        elif isinstance(node, list):
            for v in node:
                yield from keys(v)

    assert all("name" not in set(keys(r)) for r in lines())
    assert {r["resourceType"] for r in lines()} <= {"Observation", "MedicationAdministration"}


def test_every_time_lies_inside_the_48_hour_scenario() -> None:
    source = ward()
    times = [r.effective for r in source.results] + [e.start for e in source.exposures]
    times += [e.end for e in source.exposures if e.end is not None]
    assert times
    assert all(SCENARIO_START <= t <= NOW for t in times)


def test_patients_are_interleaved_in_the_feed() -> None:
    subjects = [_subject(r) for r in lines()]
    switches = sum(1 for a, b in zip(subjects, subjects[1:], strict=False) if a != b)
    assert switches > len(set(subjects)) * 3


def test_some_results_arrive_after_later_drawn_ones() -> None:
    latest_seen: dict[str, datetime] = {}
    late = []
    for resource in lines():
        if resource["resourceType"] != "Observation" or resource["status"] != "final":
            continue
        patient = _subject(resource)
        drawn = datetime.fromisoformat(resource["effectiveDateTime"])
        if patient in latest_seen and drawn < latest_seen[patient]:
            late.append(resource["identifier"][0]["value"])
        latest_seen[patient] = max(drawn, latest_seen.get(patient, drawn))
    assert len(late) >= 2, late


def test_an_identical_resend_is_recognised_as_unchanged() -> None:
    fates = [fate for _, fate in ward().decisions]
    assert fates.count(Decision.UNCHANGED) == 1


def test_the_correction_and_the_withdrawal_each_replace_a_held_version() -> None:
    updated = {lines()[n - 1]["status"] for n, fate in ward().decisions if fate is Decision.UPDATE}
    assert {"corrected", "entered-in-error"} <= updated


def test_unwatched_panel_analytes_are_dropped() -> None:
    dropped = {code for n in ward().ignored for code in loinc_codes(lines()[n - 1])}
    assert {"2075-0", "2160-0"} <= dropped
    assert all(lookup(code) is None for code in dropped)


def test_urine_results_are_present_in_the_timelines() -> None:
    urine = {(r.loinc, r.patient) for r in ward().results if r.specimen is Specimen.URINE}
    assert {loinc for loinc, _ in urine} == {"2955-3", "2695-5"}


# --- the expected flags ------------------------------------------------------------------------


def test_expected_names_exactly_the_patients_of_the_feed() -> None:
    assert set(EXPECTED["patients"]) == ward().patients


def test_expected_no_flag_list_matches_the_patients_without_rules() -> None:
    unflagged = {p for p, entry in EXPECTED["patients"].items() if not entry["rules"]}
    assert set(EXPECTED["no_flags"]) == unflagged
    assert len(unflagged) >= 3


def test_expected_uses_only_known_rule_codes_each_with_a_note() -> None:
    known = {r.value for r in Rule}
    for entry in EXPECTED["patients"].values():
        for code, note in entry["rules"].items():
            assert code in known
            assert note.strip()


def test_every_rule_family_fires_in_some_patient() -> None:
    fired = {f.rule for p in ward().patients for f in findings(ward(), p)}
    required = {
        Rule.SODIUM_CRITICAL_LOW,
        Rule.POTASSIUM_CRITICAL_HIGH,
        Rule.GLUCOSE_CRITICAL_LOW,
        Rule.OSMOLALITY_CRITICAL_HIGH,
        Rule.SODIUM_RISE_TOO_FAST,
        Rule.SODIUM_RISE_PROJECTED,
        Rule.SODIUM_FALL_TOO_FAST,
        Rule.OSMOLALITY_FALL_TOO_FAST,
        Rule.GLUCOSE_FALL_TOO_FAST,
        Rule.HYPOKALEMIA_ON_INSULIN,
    }
    assert required <= fired


@pytest.mark.parametrize("patient", sorted(EXPECTED["patients"]))
def test_active_rules_at_the_close_match_expected(patient: str) -> None:
    assert active(ward(), patient) == expected_rules(patient)


def test_findings_do_not_depend_on_arrival_order() -> None:
    backwards = read_ward(reversed(lines()))
    assert {p: active(backwards, p) for p in backwards.patients} == {
        p: active(ward(), p) for p in ward().patients
    }


# --- why each flag is there, or is not --------------------------------------------------------


def _evidence_results(finding: Finding) -> list[LabResult]:
    by_ref = {r.reference: r for r in ward().results}
    return [by_ref[ref] for ref in finding.evidence if ref in by_ref]


def _finding(rule: Rule) -> list[Finding]:
    return [f for p in sorted(ward().patients) for f in findings(ward(), p) if f.rule is rule]


def test_low_glucose_flag_rests_on_a_meter_reading_in_mg_per_dl() -> None:
    (low,) = _finding(Rule.GLUCOSE_CRITICAL_LOW)
    assert [r.loinc for r in _evidence_results(low)] == ["41653-7"]


def test_osmolality_fall_is_measured_on_serum_osmolality() -> None:
    (fall,) = _finding(Rule.OSMOLALITY_FALL_TOO_FAST)
    assert {r.loinc for r in _evidence_results(fall)} >= {"2692-2"}
    assert "(measured)" in fall.sentence


def test_glucose_fall_is_measured_on_lab_glucose_in_mg_per_dl() -> None:
    (fall,) = _finding(Rule.GLUCOSE_FALL_TOO_FAST)
    assert {r.loinc for r in _evidence_results(fall) if r.analyte is Analyte.GLUCOSE} == {"2345-7"}


def test_hypokalemia_on_insulin_fires_both_as_persistent_and_as_overdue() -> None:
    shown = {
        (f.numbers["consecutive_low"] >= 2, f.numbers["recheck_overdue"] == 1.0)
        for f in _finding(Rule.HYPOKALEMIA_ON_INSULIN)
    }
    assert (True, False) in shown  # two or more lows during the infusion, rechecked in time
    assert (False, True) in shown  # one low, not rechecked within the interval


def test_subcutaneous_insulin_never_counts_as_an_infusion() -> None:
    subcutaneous = {e.patient for e in ward().exposures if e.route == "subcutaneous"}
    assert subcutaneous
    low_k = {
        r.patient for r in ward().results if r.analyte is Analyte.POTASSIUM and (r.value or 9.9) < 3.5
    }
    assert subcutaneous & low_k  # a patient with low potassium on subcutaneous doses only
    for patient in subcutaneous & low_k:
        assert Rule.HYPOKALEMIA_ON_INSULIN.value not in active(ward(), patient)


def test_the_correction_is_what_clears_its_patient() -> None:
    (index,) = [i for i, r in enumerate(lines()) if r.get("status") == "corrected"]
    patient = _subject(lines()[index])
    uncorrected = read_ward(_without([index]))
    assert expected_rules(patient) == set()
    assert active(uncorrected, patient) - expected_rules(patient)


def test_the_withdrawal_is_what_clears_its_patient() -> None:
    (index,) = [i for i, r in enumerate(lines()) if r.get("status") == "entered-in-error"]
    patient = _subject(lines()[index])
    kept = read_ward(_without([index]))
    assert expected_rules(patient) == set()
    assert active(kept, patient) - expected_rules(patient)


def test_urine_values_would_be_dangerous_in_serum_yet_never_flag() -> None:
    source = ward()
    with_urine = sorted({r.patient for r in source.results if r.specimen is Specimen.URINE})
    assert with_urine
    for patient in with_urine:
        timeline = source.timeline(patient)
        as_serum = replace(
            timeline,
            results=tuple(
                replace(r, specimen=Specimen.SERUM_PLASMA) if r.specimen is Specimen.URINE else r
                for r in timeline.results
            ),
        )
        relabelled = {f.rule.value for f in evaluate(as_serum, policy(), NOW)}
        assert relabelled - active(source, patient), patient
        assert active(source, patient) == expected_rules(patient)


def test_readme_states_the_scenario_is_invented_and_carries_the_caution() -> None:
    text = (DEMO / "README.md").read_text("utf-8").lower()
    assert "invented" in text
    assert "decision support only" in text
    assert "site policy" in text
