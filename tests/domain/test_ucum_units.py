"""Every valid UCUM code of an analyte's property is accepted, parsed by a maintained UCUM library.

Sources: The Unified Code for Units of Measure (UCUM), Regenstrief Institute, version 2.1 —
§4.2 (the litre has two symbols, "l" and "L"), §2.6 / §12 "annotations" (curly braces carry no
meaning: mosm/kg{H2O} is mosm/kg), table 1 prefixes (u micro 1e-6, m milli 1e-3, d deci 1e-1),
§2.3 "10*" (ten to the power), the equivalent "eq" as an amount of substance, and case
sensitivity (c/s codes: "mEq/L" is not a code). The check library is ucumvert, which builds its
grammar and units from the UCUM essence.
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ucumvert import PintUcumRegistry

from service.domain.catalogue import lookup
from service.domain.units import GLUCOSE_MOLAR_MASS, UnitNotAccepted, to_canonical

ucum = PintUcumRegistry()


def entry(code: str):  # type: ignore[no-untyped-def]
    e = lookup(code)
    assert e is not None
    return e


SODIUM, GLUCOSE_MASS, GLUCOSE_MOLAR, OSMOLALITY = "2951-2", "2345-7", "14749-6", "2692-2"


@pytest.mark.parametrize(("loinc", "unit", "value", "canonical"), [
    (SODIUM, "mmol/l", 140.0, 140.0),  # UCUM §4.2: l and L are both the litre
    (SODIUM, "meq/l", 140.0, 140.0),
    (SODIUM, "umol/L", 140_000.0, 140.0),  # UCUM table 1: u = 1e-6
    (SODIUM, "mol/L", 0.14, 0.14 * 1000),
    (SODIUM, "10*-3.mol/L", 140.0, 140.0),  # UCUM §2.3: 10*-3 is 1e-3
    (SODIUM, "mmol/dL", 14.0, 140.0),  # d = 1e-1: per decilitre is ten times per litre
    (GLUCOSE_MASS, "mg/dl", 180.156, 10.0),  # M(glucose) 180.156 g/mol (IUPAC conventional atomic weights)
    (GLUCOSE_MASS, "g/L", 1.80156, 10.0),
    (GLUCOSE_MASS, "mg/L", 1801.56, 10.0),
    (GLUCOSE_MOLAR, "umol/L", 10_000.0, 10.0),
    (OSMOLALITY, "mosm/kg{H2O}", 290.0, 290.0),  # UCUM §2.6: annotations carry no meaning
    (OSMOLALITY, "mosm/kg", 290.0, 290.0),
    (OSMOLALITY, "osm/kg", 0.29, 290.0),
    (OSMOLALITY, "mmol/kg", 290.0, 290.0),
])
def test_valid_ucum_codes_of_the_property_are_accepted_and_converted(
    loinc: str, unit: str, value: float, canonical: float
) -> None:
    assert to_canonical(entry(loinc), value, code=unit, text=None) == pytest.approx(canonical, rel=1e-12)


@pytest.mark.parametrize(("loinc", "unit", "why"), [
    (SODIUM, "mEq/L", "UCUM codes are case-sensitive; the equivalent is eq"),
    (SODIUM, "mmol/liter", "not a UCUM code"),
    (SODIUM, "mg/dL", "a mass concentration under a substance-concentration term"),
    (SODIUM, "mosm/L", "osmoles are not moles of sodium"),
    (GLUCOSE_MOLAR, "meq/L", "glucose carries no charge: equivalents apply to the monovalent ions"),
    (GLUCOSE_MASS, "mmol/L", "a substance concentration under a mass-concentration term"),
    (OSMOLALITY, "mosm/L", "osmolarity (per volume) is not osmolality (per mass of water)"),
    (SODIUM, "mmol", "an amount, not a concentration"),
    (SODIUM, "", "empty"),
])
def test_codes_outside_ucum_or_the_property_are_refused(loinc: str, unit: str, why: str) -> None:
    with pytest.raises(UnitNotAccepted):
        to_canonical(entry(loinc), 1.0, code=unit, text=None)


def test_the_refusal_names_examples_of_accepted_units() -> None:
    with pytest.raises(UnitNotAccepted) as err:
        to_canonical(entry(SODIUM), 1.0, code="mg/dL", text=None)
    assert "mmol/L" in err.value.accepted


@given(st.sampled_from(["mmol/L", "mmol/l", "umol/L", "mol/L", "meq/L", "meq/l", "mmol/dL", "10*-3.mol/L",
                        "nmol/mL"]),
       st.floats(min_value=1e-3, max_value=1e6, allow_nan=False))
def test_substance_conversions_agree_with_the_ucum_library(unit: str, value: float) -> None:
    # UCUM eq is a mole for a monovalent ion such as Na+ (valence 1), so meq/L converts as mmol/L.
    expected = (value * ucum.from_ucum(unit)).to("mmol/L").magnitude
    assert to_canonical(entry(SODIUM), value, code=unit, text=None) == pytest.approx(expected, rel=1e-14)


@given(st.sampled_from(["mg/dL", "mg/dl", "g/L", "mg/L", "g/dL", "ug/mL"]),
       st.floats(min_value=1e-3, max_value=1e6, allow_nan=False))
def test_mass_conversions_agree_with_the_ucum_library_and_the_molar_mass(unit: str, value: float) -> None:
    grams_per_litre = (value * ucum.from_ucum(unit)).to("g/L").magnitude
    expected = grams_per_litre / GLUCOSE_MOLAR_MASS * 1000
    assert to_canonical(entry(GLUCOSE_MASS), value, code=unit, text=None) == pytest.approx(expected, rel=1e-14)


def test_unit_text_parsed_as_ucum_when_no_code_is_sent() -> None:
    assert to_canonical(entry(SODIUM), 140.0, code=None, text="mmol/l") == 140.0
    assert to_canonical(entry(SODIUM), 140.0, code=None, text="mEq/L") == 140.0  # the common display form
