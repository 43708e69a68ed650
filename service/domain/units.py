"""UCUM units each kind of LOINC term accepts, and exact conversion to the canonical unit.

Canonical units: mmol/L for sodium, potassium, glucose, urea and calcium; mosm/kg for osmolality.
Factors come from molar masses (IUPAC conventional atomic weights C 12.011, H 1.008, N 14.007,
O 15.999): glucose C6H12O6 180.156 g/mol, urea CH4N2O 60.056 g/mol, urea nitrogen 2 N = 28.014 g/mol.
A test checks them against a general units library.
"""

from __future__ import annotations

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


def _mg_per_dl_to_mmol_per_l(molar_mass: float) -> float:
    # 1 mg/dL = 10 mg/L; divided by g/mol gives mmol/L.
    return 10.0 / molar_mass


# Display forms that interface engines put in Quantity.unit when they send no UCUM code.
# "mEq/L" and "mOsm/kg" are not case-sensitive UCUM, so they are accepted only as unit text.
_TEXT_ALIASES = {"mEq/L": "meq/L", "mmol/l": "mmol/L", "mg/dl": "mg/dL", "mOsm/kg": "mosm/kg"}


def _table(entry: CatalogueEntry) -> dict[str, float]:
    """UCUM code → factor to canonical, for one catalogue entry."""
    if entry.quantity is Quantity.OSMOLALITY:
        return {"mosm/kg": 1.0, "mmol/kg": 1.0}
    if entry.quantity is Quantity.MOLAR:
        if entry.analyte in (Analyte.SODIUM, Analyte.POTASSIUM):
            # Monovalent ions: one equivalent is one mole.
            return {"mmol/L": 1.0, "meq/L": 1.0}
        return {"mmol/L": 1.0}
    if entry.analyte is Analyte.GLUCOSE:
        return {"mg/dL": _mg_per_dl_to_mmol_per_l(GLUCOSE_MOLAR_MASS)}
    if entry.analyte is Analyte.CALCIUM:
        return {"mg/dL": _mg_per_dl_to_mmol_per_l(CALCIUM_MOLAR_MASS)}
    if entry.analyte is Analyte.UREA:
        mass = UREA_NITROGEN_MOLAR_MASS if entry.code in UREA_NITROGEN_CODES else UREA_MOLAR_MASS
        return {"mg/dL": _mg_per_dl_to_mmol_per_l(mass)}
    raise AssertionError(f"no unit table for {entry.code}")  # the catalogue has no such entry


def accepted_units(entry: CatalogueEntry) -> tuple[str, ...]:
    """The UCUM codes this LOINC term accepts, in a stable order."""
    return tuple(_table(entry))


def to_canonical(entry: CatalogueEntry, value: float, *, code: str | None, text: str | None) -> float:
    """``value`` in the entry's canonical unit.

    ``code`` is the UCUM code (Quantity.code) and wins; ``text`` (Quantity.unit) is used only when
    no code was sent. Raises UnitNotAccepted naming the unit and the accepted ones.
    """
    table = _table(entry)
    if code is not None:
        factor = table.get(code)
        unit = code
    else:
        unit = text or ""
        factor = table.get(unit, table.get(_TEXT_ALIASES.get(unit, ""), 0.0)) or None
    if factor is None:
        raise UnitNotAccepted(unit, tuple(table))
    return value * factor
