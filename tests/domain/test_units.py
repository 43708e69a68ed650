"""Unit conversion against a general units library and published factors."""

from __future__ import annotations

import pint
import pytest

from service.domain.catalogue import lookup
from service.domain.units import (
    GLUCOSE_MOLAR_MASS,
    UREA_MOLAR_MASS,
    UREA_NITROGEN_MOLAR_MASS,
    UnitNotAccepted,
    to_canonical,
)

ureg = pint.UnitRegistry()


def entry(code: str):  # type: ignore[no-untyped-def]
    e = lookup(code)
    assert e is not None
    return e


def test_glucose_molar_mass_from_iupac_atomic_weights() -> None:
    # IUPAC conventional atomic weights C 12.011, H 1.008, O 15.999 -> C6H12O6 180.156 g/mol (IUPAC conventional atomic weights).
    assert GLUCOSE_MOLAR_MASS == pytest.approx(180.156, abs=1e-9)


def test_glucose_factor_agrees_with_pint() -> None:
    # pint: 1 mg/dL divided by 180.156 g/mol, expressed in mmol/L.
    expected = (1 * ureg("mg/dL") / (GLUCOSE_MOLAR_MASS * ureg("g/mol"))).to("mmol/L").magnitude
    assert to_canonical(entry("2345-7"), 1.0, code="mg/dL", text=None) == pytest.approx(expected, rel=1e-12)
    # arithmetic from M(glucose) = 180.156 g/mol (IUPAC conventional atomic weights): mg/dL x 0.0555074 = mmol/L.
    assert expected == pytest.approx(0.0555074, rel=1e-6)


def test_glucose_100_mg_dl_is_5_5507_mmol_l() -> None:
    # arithmetic: 100 mg/dL = 5.55074 mmol/L at M = 180.156.
    assert to_canonical(entry("2345-7"), 100.0, code="mg/dL", text=None) == pytest.approx(5.55074, abs=1e-5)


def test_bun_factor_agrees_with_pint() -> None:
    # Urea nitrogen: 2 N x 14.007 = 28.014 g per mole of urea; BUN mg/dL / 2.8014 = mmol/L (IUPAC conventional atomic weights).
    expected = (1 * ureg("mg/dL") / (UREA_NITROGEN_MOLAR_MASS * ureg("g/mol"))).to("mmol/L").magnitude
    assert to_canonical(entry("3094-0"), 1.0, code="mg/dL", text=None) == pytest.approx(expected, rel=1e-12)
    assert to_canonical(entry("3094-0"), 28.014, code="mg/dL", text=None) == pytest.approx(10.0, rel=1e-12)


def test_urea_mass_factor_agrees_with_pint() -> None:
    # Urea CH4N2O = 12.011 + 4x1.008 + 2x14.007 + 15.999 = 60.056 g/mol (IUPAC conventional atomic weights).
    assert UREA_MOLAR_MASS == pytest.approx(60.056, abs=1e-9)
    expected = (1 * ureg("mg/dL") / (UREA_MOLAR_MASS * ureg("g/mol"))).to("mmol/L").magnitude
    assert to_canonical(entry("3091-6"), 1.0, code="mg/dL", text=None) == pytest.approx(expected, rel=1e-12)


def test_meq_per_litre_equals_mmol_per_litre_for_sodium() -> None:
    # Monovalent ion: 1 mEq = 1 mmol (UCUM: the equivalent of a monovalent ion is its mole).
    assert to_canonical(entry("2951-2"), 140.0, code="meq/L", text=None) == 140.0


def test_unit_text_is_used_when_no_ucum_code_is_sent() -> None:
    assert to_canonical(entry("2951-2"), 140.0, code=None, text="mEq/L") == 140.0


def test_mass_unit_under_a_molar_code_is_refused_with_the_accepted_units() -> None:
    with pytest.raises(UnitNotAccepted) as err:
        to_canonical(entry("14749-6"), 100.0, code="mg/dL", text=None)
    assert "mmol/L" in err.value.accepted and "mg/dL" not in err.value.accepted


def test_ucum_is_case_sensitive() -> None:
    # UCUM: "mEq/L" is display text, not a case-sensitive UCUM code (the code is "meq/L").
    with pytest.raises(UnitNotAccepted):
        to_canonical(entry("2951-2"), 140.0, code="mEq/L", text=None)


def test_calcium_mass_factor_agrees_with_pint() -> None:
    # Ca 40.078 g/mol (IUPAC conventional atomic weight): 10 mg/dL = 2.495 mmol/L
    expected = (1 * ureg("mg/dL") / (40.078 * ureg("g/mol"))).to("mmol/L").magnitude
    assert to_canonical(entry("17861-6"), 1.0, code="mg/dL", text=None) == pytest.approx(expected, rel=1e-12)
    assert to_canonical(entry("17861-6"), 10.0, code="mg/dL", text=None) == pytest.approx(2.495, abs=1e-3)
