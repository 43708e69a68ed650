"""The LOINC catalogue: well-formed codes, right property, urine kept apart."""

from __future__ import annotations

import pytest

from service.domain.catalogue import CATALOGUE, Quantity, loinc_check_digit, lookup
from service.domain.values import Analyte, Specimen


def test_check_digit_of_the_published_example() -> None:
    # LOINC Users' Guide, mod-10 appendix: 12345 -> odd 531x2=1062, even 42, "421062" sums 15 -> 5.
    assert loinc_check_digit("12345") == 5


@pytest.mark.parametrize("code", sorted(CATALOGUE))
def test_every_catalogue_code_passes_the_loinc_check_digit(code: str) -> None:
    # Algorithm: LOINC Users' Guide mod-10 check digit; codes: VSAC value-set expansions (LOINC; VSAC value-set expansion of the sodium lab tests).
    body, digit = code.split("-")
    assert loinc_check_digit(body) == int(digit)


@pytest.mark.parametrize("wrong", ["2692-8", "2692-7", "2951-3"])
def test_misremembered_codes_fail_the_check_digit(wrong: str) -> None:
    # commonly mis-remembered codes: 2692-8 and 2692-7 circulate for serum osmolality; the check digit is 2.
    body, digit = wrong.split("-")
    assert loinc_check_digit(body) != int(digit)


def test_check_digit_needs_digits() -> None:
    with pytest.raises(ValueError):
        loinc_check_digit("29a1")


def test_serum_sodium_is_molar_serum_sodium() -> None:
    # LOINC 2951-2 Sodium [Moles/volume] in Serum or Plasma (VSAC Sodium Lab Test value set).
    entry = lookup("2951-2")
    assert entry is not None
    assert (entry.analyte, entry.specimen, entry.quantity) == (Analyte.SODIUM, Specimen.SERUM_PLASMA, Quantity.MOLAR)


@pytest.mark.parametrize("code", ["2955-3", "2828-2", "2695-5"])
def test_urine_codes_are_marked_urine(code: str) -> None:
    # LOINC (VSAC value-set expansions): urine sodium 2955-3, urine potassium 2828-2, urine osmolality 2695-5.
    entry = lookup(code)
    assert entry is not None and entry.specimen is Specimen.URINE


def test_glucose_mass_and_molar_codes_are_distinct_properties() -> None:
    # LOINC (VSAC value-set expansions): 2345-7 Glucose [Mass/volume], 14749-6 Glucose [Moles/volume], both serum/plasma.
    mass, molar = lookup("2345-7"), lookup("14749-6")
    assert mass is not None and molar is not None
    assert (mass.quantity, molar.quantity) == (Quantity.MASS, Quantity.MOLAR)


def test_meter_glucose_is_point_of_care() -> None:
    # LOINC (VSAC value-set expansions): 41653-7 Glucose in Capillary blood by Glucometer.
    entry = lookup("41653-7")
    assert entry is not None and entry.specimen is Specimen.POINT_OF_CARE


def test_unwatched_code_is_not_in_the_catalogue() -> None:
    assert lookup("2075-0") is None  # chloride: common practice to leave it to other systems
