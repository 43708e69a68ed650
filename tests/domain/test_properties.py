"""Invariants: findings are a function of the data, policy and time, not of arrival order."""

from __future__ import annotations

from datetime import timedelta

from hypothesis import given, settings
from hypothesis import strategies as st

from service.domain.findings import Rule
from service.domain.rules import evaluate
from service.domain.values import Analyte, InsulinExposure, LabResult, Specimen, Timeline
from service.policy import load_policy
from tests.domain.test_support import PATIENT, at, insulin, lab, timeline

POLICY = load_policy()

_RANGES = {
    Analyte.SODIUM: (100.0, 170.0),
    Analyte.POTASSIUM: (2.0, 7.0),
    Analyte.GLUCOSE: (1.0, 45.0),
    Analyte.OSMOLALITY: (240.0, 380.0),
}


@st.composite
def results(draw: st.DrawFn) -> list[LabResult]:
    n = draw(st.integers(min_value=0, max_value=14))
    out = []
    for i in range(n):
        analyte = draw(st.sampled_from(list(_RANGES)))
        lo, hi = _RANGES[analyte]
        value = draw(st.floats(min_value=lo, max_value=hi, allow_nan=False).map(lambda v: round(v, 1)))
        hour = draw(st.integers(min_value=0, max_value=96)) / 2
        specimen = draw(st.sampled_from(list(Specimen)))
        comparator = draw(st.sampled_from([None, None, None, "<", ">"]))
        out.append(lab(analyte, value, hour, specimen=specimen, comparator=comparator, obs_id=f"o{i}"))
    return out


exposures = st.lists(
    st.builds(
        lambda s, d, i: insulin(s, None if d is None else s + d, source_id=f"m{i}"),
        st.integers(min_value=0, max_value=40),
        st.one_of(st.none(), st.integers(min_value=1, max_value=10)),
        st.integers(min_value=0, max_value=3),
    ),
    max_size=2,
    unique_by=lambda e: e.source_id,
)


def shuffled_with_repeats(data: st.DataObject, items: list[LabResult]) -> list[LabResult]:
    repeats = data.draw(st.lists(st.sampled_from(items), max_size=4)) if items else []
    return data.draw(st.permutations(items + repeats))


@settings(max_examples=150, deadline=None)
@given(results(), exposures, st.data())
def test_shuffled_and_duplicated_results_give_the_same_findings(
    rs: list[LabResult], es: list[InsulinExposure], data: st.DataObject
) -> None:
    now = at(60)
    expected = evaluate(timeline(rs, es), POLICY, now)
    again = evaluate(timeline(shuffled_with_repeats(data, rs), list(reversed(es))), POLICY, now)
    assert again == expected


@settings(max_examples=150, deadline=None)
@given(results(), exposures, st.integers(min_value=1, max_value=500))
def test_a_later_now_never_changes_findings_that_do_not_depend_on_time(
    rs: list[LabResult], es: list[InsulinExposure], later_hours: int
) -> None:
    now = at(60)
    def timeless(now_h: timedelta) -> list[object]:
        return [f for f in evaluate(timeline(rs, es), POLICY, now + now_h) if f.rule is not Rule.HYPOKALEMIA_ON_INSULIN]
    assert timeless(timedelta(0)) == timeless(timedelta(hours=later_hours))


@settings(max_examples=100, deadline=None)
@given(results())
def test_urine_results_never_change_any_finding(rs: list[LabResult]) -> None:
    urine_free = [r for r in rs if r.specimen is not Specimen.URINE]
    now = at(60)
    assert evaluate(timeline(rs), POLICY, now) == evaluate(timeline(urine_free), POLICY, now)


@settings(max_examples=100, deadline=None)
@given(results())
def test_every_finding_cites_only_results_of_its_timeline_and_onsets_are_data_times(
    rs: list[LabResult],
) -> None:
    tl: Timeline = timeline(rs)
    references = {r.reference for r in rs}
    times = {r.effective for r in rs}
    for f in evaluate(tl, POLICY, at(60)):
        assert f.patient == PATIENT
        assert f.evidence and set(f.evidence) <= references
        assert f.onset in times
        # One sentence of findings; a second only for the artefact caution or the crisis warning.
        first, *rest = f.sentence.split(". ")
        assert f.sentence.endswith(".") and len(rest) <= 1
        assert not rest or rest[0].startswith(("Possible specimen artefact", "A falling corrected sodium"))
