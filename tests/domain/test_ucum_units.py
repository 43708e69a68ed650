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


# UCUM functional tests (G. Grieve et al., ucum.org/docs/functional-tests, validation cases by id):
# codes the file calls valid UCUM, of a concentration or osmolality.
@pytest.mark.parametrize(("case", "loinc", "unit"), [
    ("1-166", SODIUM, "mmol/l"),
    ("1-183", GLUCOSE_MOLAR, "umol/l"),
    ("1-147", GLUCOSE_MASS, "g/l"),
    ("k=1=169", SODIUM, "mol/L"),
    ("k=1=177", SODIUM, "mol/m3"),
    ("k=1=227", GLUCOSE_MOLAR, "umol/L"),
    ("k=1=255", SODIUM, "meq/L"),
    ("k=1=253", GLUCOSE_MASS, "g/dL"),
    ("k=1=171", GLUCOSE_MASS, "ug/L"),
    ("k=1=206", GLUCOSE_MASS, "kg/L"),
    ("k=1=214", GLUCOSE_MASS, "kg/m3"),
])
def test_functional_test_valid_codes_of_the_property_are_accepted_as_the_library_converts(
    case: str, loinc: str, unit: str
) -> None:
    e = entry(loinc)
    got = to_canonical(e, 1.0, code=unit, text=None)
    if e.quantity.name == "MASS":
        expected = ucum.from_ucum(unit).to("g/L").magnitude / GLUCOSE_MOLAR_MASS * 1000
    else:
        expected = ucum.from_ucum(unit).to("mmol/L").magnitude
    assert got == pytest.approx(expected, rel=1e-14), case


# The same file's invalid cases (by id): none may be taken as a unit, and none may crash the parse.
@pytest.mark.parametrize(("case", "unit"), [
    ("1-102", "m/"), ("1-108", "10+3/ul"), ("1-115a", "rad2{錠}"), ("1-116a", "{a}rad2{b}"),
    ("1-118", "{|}1"), ("1-149", "iU"), ("1-210", "molv"), ("1-299", "mmol/12h"), ("1-305", "mmol/kg[H20]"),
])
def test_functional_test_invalid_codes_are_refused(case: str, unit: str) -> None:
    for loinc in (SODIUM, GLUCOSE_MASS, OSMOLALITY):
        with pytest.raises(UnitNotAccepted):
            to_canonical(entry(loinc), 1.0, code=unit, text=None)


# UCUM §2.6 (annotations): an annotation alone is a valid unit of one, such as "{rbc}" (functional
# tests 1-119 "{e}"): a unit of one is no concentration, so it is refused, never a crash.
@pytest.mark.parametrize("unit", ["{rbc}", "{e}", "{}", "1{c}"])
def test_an_annotation_alone_is_refused_as_a_unit_of_one(unit: str) -> None:
    with pytest.raises(UnitNotAccepted):
        to_canonical(entry(SODIUM), 1.0, code=unit, text=None)


_UCUM_CHARS = "mMuUdDcCkKgGlLoOsSeEqQ/.*-+0123456789{}[]()_'H% "


@given(st.text(alphabet=_UCUM_CHARS, max_size=14) | st.text(max_size=8) | st.from_regex(r"\{[a-z]*\}", fullmatch=True))
def test_any_unit_string_is_accepted_or_refused_never_an_error(unit: str) -> None:
    for loinc in (SODIUM, GLUCOSE_MASS, OSMOLALITY):
        try:
            to_canonical(entry(loinc), 1.0, code=unit, text=None)
        except UnitNotAccepted:
            pass


# Built from UCUM's own parts (table 1 prefixes; the mole, equivalent, osmole and gram; the litre in
# both symbols, the cubic metre and decimetre; an optional annotation): whatever to_canonical accepts
# converts exactly as the UCUM library converts it, and what the library reads as the property is accepted.
_PREFIX = st.sampled_from(["", "m", "u", "n", "p", "k", "d", "c"])
_SUBSTANCE = st.sampled_from(["mol", "eq", "osm", "g"])
_PER = st.sampled_from(["L", "l", "dL", "dl", "mL", "ul", "m3", "dm3", "cm3", "kg", "g", "mg"])
_NOTE = st.sampled_from(["", "{H2O}", "{total}"])


@given(_PREFIX, _SUBSTANCE, _PER, _NOTE, st.sampled_from([SODIUM, GLUCOSE_MASS, GLUCOSE_MOLAR, OSMOLALITY]))
def test_every_built_unit_is_accepted_exactly_when_it_fits_and_converts_as_the_library_does(
    prefix: str, amount: str, per: str, note: str, loinc: str
) -> None:
    unit = f"{prefix}{amount}/{per}{note}"
    e = entry(loinc)
    try:
        q = ucum.from_ucum(unit)
        dims = dict(q.dimensionality)
    except Exception:  # noqa: BLE001 - the library's own refusal: then ours must refuse too
        with pytest.raises(UnitNotAccepted):
            to_canonical(e, 1.0, code=unit, text=None)
        return
    per_volume = dims.get("[length]") == -3
    fits = {
        "MOLAR": per_volume and (amount == "mol" or (amount == "eq" and loinc == SODIUM)),
        "MASS": per_volume and amount == "g",
        "OSMOLALITY": not per_volume and dims.get("[mass]") == -1 and amount in ("mol", "osm"),
    }[e.quantity.name]
    if not fits:
        with pytest.raises(UnitNotAccepted):
            to_canonical(e, 1.0, code=unit, text=None)
        return
    got = to_canonical(e, 1.0, code=unit, text=None)
    if e.quantity.name == "MASS":
        expected = q.to("g/L").magnitude / GLUCOSE_MOLAR_MASS * 1000
    elif e.quantity.name == "OSMOLALITY":
        expected = q.to("mmol/kg").magnitude
    else:
        expected = q.to("mmol/L").magnitude
    assert got == pytest.approx(expected, rel=1e-12), unit
