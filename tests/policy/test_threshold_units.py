"""Policy thresholds written in the unit of their source are compared exactly in canonical units.

Glucose: M = 180.156 g/mol (IUPAC conventional atomic weights), so 250 mg/dL = 13.8769 mmol/L; the
crisis entry of 250 mg/dL is Kitabchi AE et al, Diabetes Care 2009;32:1335-1343 (from memory).
Paediatric and neonatal limits: RCPath G158 (2017) sodium <= 130 and glucose >= 15 mmol/L under 16 y;
Campbell CA et al, Clin Chem Lab Med 2018;57:89-94, potassium > 7.0 (serum) for 0-6 months.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from service.domain.catalogue import lookup
from service.domain.findings import Rule
from service.domain.rules import evaluate
from service.domain.units import to_canonical
from service.domain.values import Analyte, Specimen
from service.policy import PolicyError, load_policy
from service.policy.model import in_canonical_unit
from tests.domain.test_support import at, glu, k, na, timeline


def test_a_threshold_in_mg_dl_equals_a_result_of_the_same_mg_dl_exactly() -> None:
    entry = lookup("2345-7")
    assert entry is not None
    result = to_canonical(entry, 250.0, code="mg/dL", text=None)
    assert load_policy().crisis.starting_glucose_at_least == result  # equal, not approximately
    assert result == pytest.approx(250 / 18.0156, rel=1e-12)


def test_a_threshold_in_g_per_litre_is_converted_by_the_same_function_as_results() -> None:
    # Any UCUM unit of the property works in policy as in results: 2.5 g/L = 250 mg/dL (UCUM prefixes).
    assert in_canonical_unit(Analyte.GLUCOSE, "2.5 g/L") == pytest.approx(
        in_canonical_unit(Analyte.GLUCOSE, "250 mg/dL"), rel=1e-14)


def test_a_plain_number_is_read_in_the_canonical_unit() -> None:
    assert in_canonical_unit(Analyte.GLUCOSE, 13.9) == 13.9


def test_a_unit_that_does_not_fit_the_analyte_is_refused_by_name(tmp_path: Path) -> None:
    text = (Path(__file__).parents[2] / "service/policy/default.toml").read_text()
    path = tmp_path / "p.toml"
    # mosm/kg is UCUM, but an osmolality, not a glucose concentration.
    path.write_text(text.replace('starting_glucose_at_least = "250 mg/dL"', 'starting_glucose_at_least = "250 mosm/kg"'))
    with pytest.raises(PolicyError, match=r"crisis\.starting_glucose_at_least: .*'mosm/kg' is not a UCUM unit for glucose"):
        load_policy(path)


def test_a_level_limit_may_be_written_in_mg_dl(tmp_path: Path) -> None:
    text = (Path(__file__).parents[2] / "service/policy/default.toml").read_text()
    path = tmp_path / "p.toml"
    # Kost 1990 survey mean glucose low: 46 mg/dL
    path.write_text(text.replace("low = 2.5   # RCPath G158 2017 (adults", 'low = "46 mg/dL"   # Kost 1990 (adults', 1))
    limit = load_policy(path).level_for(Analyte.GLUCOSE, Specimen.SERUM_PLASMA)
    assert limit is not None and limit.low == pytest.approx(46 / 18.0156, rel=1e-12)


def rules(results, profile: str) -> set[Rule]:  # type: ignore[no-untyped-def]
    return {f.rule for f in evaluate(timeline(results), load_policy(profile=profile), at(10))}


@pytest.mark.parametrize(("value", "flagged"), [(130.0, True), (130.1, False)])
def test_the_paediatric_profile_flags_sodium_at_or_below_130(value: float, flagged: bool) -> None:
    assert (Rule.SODIUM_CRITICAL_LOW in rules([na(value, 1)], "paediatric")) is flagged
    assert Rule.SODIUM_CRITICAL_LOW not in rules([na(value, 1)], "adult")


@pytest.mark.parametrize(("value", "flagged"), [(15.0, True), (14.9, False)])
def test_the_paediatric_profile_flags_glucose_at_or_above_15(value: float, flagged: bool) -> None:
    assert (Rule.GLUCOSE_CRITICAL_HIGH in rules([glu(value, 1)], "paediatric")) is flagged


@pytest.mark.parametrize(("value", "flagged"), [(7.0, True), (6.9, False)])
def test_the_neonatal_profile_flags_potassium_from_7(value: float, flagged: bool) -> None:
    assert (Rule.POTASSIUM_CRITICAL_HIGH in rules([k(value, 1)], "neonatal")) is flagged
    assert Rule.POTASSIUM_CRITICAL_HIGH in rules([k(6.9, 1)], "adult")  # adult 6.5
