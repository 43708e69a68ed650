"""UCUM units each kind of LOINC term accepts, and exact conversion to the canonical unit.

Any valid UCUM code whose dimension fits the term's LOINC property is accepted: the code is parsed
by ucumvert, a maintained UCUM library built from the UCUM essence (so the litre's two symbols l/L,
prefixes, ``10*`` powers and annotations such as ``{H2O}`` all behave as UCUM says). The property
decides the rest: a substance concentration (moles per volume; equivalents for the monovalent ions
sodium and potassium only), a mass concentration (converted with the analyte's molar mass), or an
osmolality (osmoles or moles per mass).

Canonical units: mmol/L for sodium, potassium, glucose, urea and calcium; mosm/kg for osmolality.
Factors come from molar masses (IUPAC conventional atomic weights C 12.011, H 1.008, N 14.007,
O 15.999): glucose C6H12O6 180.156 g/mol, urea CH4N2O 60.056 g/mol, urea nitrogen 2 N = 28.014 g/mol.
Tests check them against the UCUM library and a general units library.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum
from functools import lru_cache
from typing import Any

from service.domain.catalogue import UREA_NITROGEN_CODES, CatalogueEntry, Quantity
from service.domain.values import Analyte

__all__ = [
    "GLUCOSE_MOLAR_MASS",
    "CALCIUM_MOLAR_MASS",
    "UREA_MOLAR_MASS",
    "UREA_NITROGEN_MOLAR_MASS",
    "UnitNotAccepted",
    "accepted_units",
    "to_canonical",
]

GLUCOSE_MOLAR_MASS = 6 * 12.011 + 12 * 1.008 + 6 * 15.999  # 180.156 g/mol
UREA_MOLAR_MASS = 12.011 + 4 * 1.008 + 2 * 14.007 + 15.999  # 60.056 g/mol
UREA_NITROGEN_MOLAR_MASS = 2 * 14.007  # 28.014 g per mole of urea
CALCIUM_MOLAR_MASS = 40.078  # g/mol, IUPAC conventional atomic weight of Ca

UCUM_SYSTEM = "http://unitsofmeasure.org"


class UnitNotAccepted(ValueError):
    """The unit does not fit the LOINC term; ``accepted`` lists the UCUM codes that would."""

    def __init__(self, unit: str, accepted: tuple[str, ...]) -> None:
        super().__init__(unit)
        self.unit = unit
        self.accepted = accepted


# Display forms that interface engines put in Quantity.unit when they send no UCUM code.
# "mEq/L" and "mOsm/kg" are not case-sensitive UCUM, so they are accepted only as unit text.
_TEXT_ALIASES = {"mEq/L": "meq/L", "mOsm/kg": "mosm/kg", "mOsm/kg H2O": "mosm/kg"}


class _Amount(Enum):
    """What the numerator of a unit counts."""

    MOLE = "mol"
    EQUIVALENT = "eq"
    OSMOLE = "osm"
    MASS = "g"


@dataclass(frozen=True, slots=True)
class _Parsed:
    amount: _Amount
    per_volume: bool  # per litre (else per kilogram)
    scale: float  # the unit in mmol/L, mmol/kg or g/L (mosm/kg counted as mmol/kg)


@lru_cache(maxsize=1)
def _registry() -> Any:
    # Imported on first use: building the registry from the UCUM essence takes about a second.
    from ucumvert import PintUcumRegistry  # type: ignore[import-untyped]

    return PintUcumRegistry()


@lru_cache(maxsize=1024)
def _parse(code: str) -> _Parsed | None:
    """The UCUM code's amount kind, denominator and scale; None if it is no UCUM code of a concentration
    or osmolality."""
    if not code or code != code.strip():
        return None
    import pint  # loaded with the registry (see _registry); this parse is cached

    reg = _registry()
    try:
        q = reg.from_ucum(code)
    except Exception:  # noqa: BLE001 - the library raises several kinds for codes outside UCUM
        return None
    if not isinstance(q, pint.Quantity):
        # An annotation alone ("{rbc}") is valid UCUM for the unit one (UCUM §2.6); the library hands
        # back its parse token rather than a quantity. A unit of one is no concentration.
        return None
    names = [str(u) for u in q.units._units]
    amount = (_Amount.OSMOLE if any("osmole" in n for n in names)
              else _Amount.EQUIVALENT if any("equivalent" in n for n in names)
              else _Amount.MOLE if any(n.endswith("mole") for n in names) else _Amount.MASS)
    dims = dict(q.dimensionality)
    if amount is _Amount.MASS:
        if dims != {"[mass]": 1, "[length]": -3}:
            return None
        return _Parsed(amount, True, float(q.to("g/L").magnitude))
    if dims == {"[substance]": 1, "[length]": -3}:
        return _Parsed(amount, True, float(q.to("mmol/L").magnitude))
    if dims == {"[substance]": 1, "[mass]": -1}:
        return _Parsed(amount, False, float(q.to("mmol/kg").magnitude))
    return None


def _molar_mass(entry: CatalogueEntry) -> float:
    if entry.analyte is Analyte.GLUCOSE:
        return GLUCOSE_MOLAR_MASS
    if entry.analyte is Analyte.CALCIUM:
        return CALCIUM_MOLAR_MASS
    if entry.analyte is Analyte.UREA:
        return UREA_NITROGEN_MOLAR_MASS if entry.code in UREA_NITROGEN_CODES else UREA_MOLAR_MASS
    raise AssertionError(f"no molar mass for {entry.code}")  # the catalogue has no such entry


def _factor(entry: CatalogueEntry, unit: _Parsed) -> float | None:
    """Multiply by this to get the entry's canonical unit; None if the unit does not fit the property."""
    if entry.quantity is Quantity.OSMOLALITY:
        ok = not unit.per_volume and unit.amount in (_Amount.OSMOLE, _Amount.MOLE)
    elif entry.quantity is Quantity.MOLAR:
        # Equivalents only where one equivalent is one mole: the monovalent ions.
        monovalent = entry.analyte in (Analyte.SODIUM, Analyte.POTASSIUM)
        ok = unit.per_volume and (unit.amount is _Amount.MOLE or (unit.amount is _Amount.EQUIVALENT and monovalent))
    else:
        ok = unit.per_volume and unit.amount is _Amount.MASS
        if ok:
            return unit.scale / _molar_mass(entry) * 1000  # g/L / (g/mol) = mol/L
    return unit.scale if ok else None


def accepted_units(entry: CatalogueEntry) -> tuple[str, ...]:
    """Examples of the UCUM codes this LOINC term accepts (any UCUM code of the same property is)."""
    if entry.quantity is Quantity.OSMOLALITY:
        return ("mosm/kg", "mmol/kg", "mosm/kg{H2O}")
    if entry.quantity is Quantity.MOLAR:
        if entry.analyte in (Analyte.SODIUM, Analyte.POTASSIUM):
            return ("mmol/L", "meq/L", "umol/L")
        return ("mmol/L", "umol/L")
    return ("mg/dL", "g/L", "mg/L")


def to_canonical(entry: CatalogueEntry, value: float, *, code: str | None, text: str | None) -> float:
    """``value`` in the entry's canonical unit.

    ``code`` is the UCUM code (Quantity.code) and wins; ``text`` (Quantity.unit) is used only when
    no code was sent, read as UCUM or as a common display form. Raises UnitNotAccepted naming the
    unit and examples of accepted ones.
    """
    unit = code if code is not None else (text or "")
    parsed = _parse(unit) if code is not None else _parse(_TEXT_ALIASES.get(unit, unit))
    factor = _factor(entry, parsed) if parsed is not None else None
    if factor is None:
        raise UnitNotAccepted(unit, accepted_units(entry))
    return value * factor
