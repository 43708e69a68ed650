"""Derived values: glucose-corrected sodium, effective and calculated osmolality, pairing."""

from __future__ import annotations

from datetime import timedelta

import pytest

from service.domain.derived import (
    REFERENCE_GLUCOSE_MMOL,
    calculated_osmolality,
    corrected_sodium,
    effective_osmolality,
    pair_nearest,
)
from tests.domain.test_support import MG_DL_PER_MMOL_L, glu, na

KATZ = 1.6
HILLIER = 2.4


def mmol(mg_dl: float) -> float:
    return mg_dl / MG_DL_PER_MMOL_L


def test_reference_glucose_is_100_mg_dl_at_molar_mass_180_156() -> None:
    # Katz 1973 formula in SI units (arithmetic): 100 mg/dL = 5.55074 mmol/L at M = 180.156 g/mol
    assert REFERENCE_GLUCOSE_MMOL == pytest.approx(5.55074, abs=1e-5)


@pytest.mark.parametrize(
    ("sodium", "glucose_mg_dl", "factor", "expected"),
    [
        # Katz 1973, worked by hand (example 1): Na 130, Glu 600 mg/dL -> 138.0
        (130, 600, KATZ, 138.0),
        # Hillier 1999, worked by hand (example 1): Na 130, Glu 600 mg/dL -> 142.0
        (130, 600, HILLIER, 142.0),
        # Katz 1973, worked by hand (example 2): Na 125, Glu 1000 mg/dL -> 139.4
        (125, 1000, KATZ, 139.4),
        # Hillier 1999, worked by hand (example 2): Na 125, Glu 1000 mg/dL -> 146.6
        (125, 1000, HILLIER, 146.6),
        # Katz 1973, worked by hand (example 3): Na 140, Glu 400 mg/dL -> 144.8
        (140, 400, KATZ, 144.8),
        # Hillier 1999, worked by hand (example 3): Na 140, Glu 400 mg/dL -> 147.2
        (140, 400, HILLIER, 147.2),
    ],
)
def test_corrected_sodium_matches_published_examples_in_mg_dl(
    sodium: float, glucose_mg_dl: float, factor: float, expected: float
) -> None:
    assert corrected_sodium(sodium, mmol(glucose_mg_dl), factor) == pytest.approx(expected, abs=1e-6)


def test_corrected_sodium_si_example_katz() -> None:
    # Katz 1973, worked by hand (example 4) (SI): Na 130, Glu 33.3 mmol/L -> 137.9987
    assert corrected_sodium(130, 33.3, KATZ) == pytest.approx(137.9987, abs=1e-4)


def test_corrected_sodium_si_example_hillier() -> None:
    # Hillier 1999, worked by hand (example 4) (SI): Na 130, Glu 33.3 mmol/L -> 141.9981
    assert corrected_sodium(130, 33.3, HILLIER) == pytest.approx(141.9981, abs=1e-4)


def test_corrected_sodium_default_factor_is_katz() -> None:
    # Katz 1973, worked by hand (example 1): 138.0 with the default factor
    assert corrected_sodium(130, mmol(600)) == pytest.approx(138.0, abs=1e-6)


def test_corrected_sodium_adds_nothing_at_or_below_100_mg_dl() -> None:
    # Our choice (documented in derived.py): the correction describes excess glucose only.
    assert corrected_sodium(140, mmol(100)) == pytest.approx(140.0)
    assert corrected_sodium(140, 3.0) == 140


def test_calculated_osmolality_si_example_3() -> None:
    # Mustafa 2023 (JBDS) SI formula, worked by hand (example 3):
    # Na 135, glucose 40.0, urea 15.0 mmol/L -> 325
    assert calculated_osmolality(135, 40.0, 15.0) == pytest.approx(325.0)


@pytest.mark.parametrize(
    ("sodium", "glucose_mg_dl", "bun_mg_dl", "expected"),
    [
        # Smithline & Gardner 1976 (from memory), worked by hand (example 1) -> 290
        # (the reference divides by 18 and 2.8; our exact factors give 290.0 within 0.05)
        (140, 90, 14, 290.0),
        # worked by hand (example 2): Na 150, Glu 900, BUN 56 -> 370
        (150, 900, 56, 370.0),
        # worked by hand (example 4): Na 128, Glu 600, BUN 28 -> 299.333
        (128, 600, 28, 299.333),
    ],
)
def test_calculated_osmolality_us_unit_examples(
    sodium: float, glucose_mg_dl: float, bun_mg_dl: float, expected: float
) -> None:
    urea = bun_mg_dl / 2.8014  # BUN mg/dL -> urea mmol/L, 2 N x 14.007 (IUPAC conventional atomic weights)
    # The worked examples use the rounded divisors 18 and 2.8, hence the tolerance.
    assert calculated_osmolality(sodium, mmol(glucose_mg_dl), urea) == pytest.approx(expected, abs=0.1)


@pytest.mark.parametrize(
    ("sodium", "glucose_mmol", "expected"),
    [
        # Kitabchi 2009 (ADA) definition, worked by hand: Na 135, Glu 40 -> 310
        (135, 40.0, 310.0),
        # worked by hand (example 1): Na 140, Glu 90 mg/dL -> 285 (divisor 18)
        (140, 90 / 18, 285.0),
        # worked by hand (example 2): Na 150, Glu 900 mg/dL -> 350 (divisor 18)
        (150, 900 / 18, 350.0),
        # worked by hand (example 4): Na 128, Glu 600 mg/dL -> 289.333 (divisor 18)
        (128, 600 / 18, 289.3333),
    ],
)
def test_effective_osmolality_without_measured_is_two_sodium_plus_glucose(
    sodium: float, glucose_mmol: float, expected: float
) -> None:
    assert effective_osmolality(sodium, glucose_mmol) == pytest.approx(expected, abs=1e-3)


def test_effective_osmolality_prefers_the_measured_value() -> None:
    # The brief's definition (measured osmolality when present); no external source.
    assert effective_osmolality(135, 40.0, measured=330.0) == 330.0


def test_effective_osmolality_is_unknown_without_sodium_or_glucose() -> None:
    assert effective_osmolality(None, 40.0) is None
    assert effective_osmolality(135, None) is None


def test_pairing_takes_the_nearest_result_within_the_window() -> None:
    anchor = na(130, 1.0)
    near, far = glu(30, 1.1), glu(20, 0.8)
    assert pair_nearest(anchor, [far, near], timedelta(minutes=15)) is near


def test_pairing_window_is_inclusive_and_refuses_just_outside() -> None:
    anchor = na(130, 1.0)
    on_edge = glu(30, 1.25)  # exactly 15 min after
    outside = glu(30, 1.0 + 15.01 / 60)
    assert pair_nearest(anchor, [on_edge], timedelta(minutes=15)) is on_edge
    assert pair_nearest(anchor, [outside], timedelta(minutes=15)) is None


def test_pairing_ties_go_to_the_earlier_draw_whatever_the_order() -> None:
    anchor = na(130, 1.0)
    before, after = glu(30, 0.9), glu(20, 1.1)
    assert pair_nearest(anchor, [after, before], timedelta(minutes=15)) is before
    assert pair_nearest(anchor, [before, after], timedelta(minutes=15)) is before


def test_pairing_ignores_censored_values() -> None:
    anchor = na(130, 1.0)
    assert pair_nearest(anchor, [glu(33.3, 1.0, comparator=">")], timedelta(minutes=15)) is None
