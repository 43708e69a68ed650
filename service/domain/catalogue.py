"""The LOINC codes lytestream watches, what each one measures, and the units it accepts.

A code outside this catalogue is acknowledged and dropped at triage. Mass and molar codes for
glucose and urea are different terms: each accepts only units of its own property, so a value in
mg/dL under a moles/volume code is refused rather than silently converted.

Codes and names: LOINC, as listed in value-set expansions (sodium, potassium, glucose and BUN lab
tests) and national code lists; every code passes the LOINC mod-10 check digit (tested).
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum

from service.domain.values import Analyte, Specimen

__all__ = ["CATALOGUE", "LOINC_SYSTEM", "CatalogueEntry", "Quantity", "loinc_check_digit", "lookup"]

LOINC_SYSTEM = "http://loinc.org"


class Quantity(StrEnum):
    """The LOINC property: which family of units fits the code."""

    MOLAR = "moles/volume"  # mmol/L (meq/L for monovalent ions)
    MASS = "mass/volume"  # mg/dL
    OSMOLALITY = "osmolality"  # mosm/kg


@dataclass(frozen=True, slots=True)
class CatalogueEntry:
    code: str
    analyte: Analyte
    specimen: Specimen
    quantity: Quantity
    display: str
    calculated: bool = False


def _entries() -> tuple[CatalogueEntry, ...]:
    na, k, glu, osm, urea = (
        Analyte.SODIUM,
        Analyte.POTASSIUM,
        Analyte.GLUCOSE,
        Analyte.OSMOLALITY,
        Analyte.UREA,
    )
    ser, wb, poc, ur = Specimen.SERUM_PLASMA, Specimen.WHOLE_BLOOD, Specimen.POINT_OF_CARE, Specimen.URINE
    mol, mass, osmq = Quantity.MOLAR, Quantity.MASS, Quantity.OSMOLALITY
    E = CatalogueEntry
    return (
        E("2951-2", na, ser, mol, "Sodium [Moles/volume] in Serum or Plasma"),
        E("77139-4", na, ser, mol, "Sodium [Moles/volume] in Serum, Plasma or Blood"),
        E("2947-0", na, wb, mol, "Sodium [Moles/volume] in Blood"),
        E("32717-1", na, wb, mol, "Sodium [Moles/volume] in Arterial blood"),
        E("39791-9", na, wb, mol, "Sodium [Moles/volume] in Venous blood"),
        E("41657-8", na, wb, mol, "Sodium [Moles/volume] in Mixed venous blood"),
        E("39792-7", na, wb, mol, "Sodium [Moles/volume] in Capillary blood"),
        E("2955-3", na, ur, mol, "Sodium [Moles/volume] in Urine"),
        E("2823-3", k, ser, mol, "Potassium [Moles/volume] in Serum or Plasma"),
        E("77142-8", k, ser, mol, "Potassium [Moles/volume] in Serum, Plasma or Blood"),
        E("6298-4", k, wb, mol, "Potassium [Moles/volume] in Blood"),
        E("32713-0", k, wb, mol, "Potassium [Moles/volume] in Arterial blood"),
        E("39789-3", k, wb, mol, "Potassium [Moles/volume] in Venous blood"),
        E("41656-0", k, wb, mol, "Potassium [Moles/volume] in Mixed venous blood"),
        E("39790-1", k, wb, mol, "Potassium [Moles/volume] in Capillary blood"),
        E("2828-2", k, ur, mol, "Potassium [Moles/volume] in Urine"),
        E("2345-7", glu, ser, mass, "Glucose [Mass/volume] in Serum or Plasma"),
        E("14749-6", glu, ser, mol, "Glucose [Moles/volume] in Serum or Plasma"),
        E("74774-1", glu, ser, mass, "Glucose [Mass/volume] in Serum, Plasma or Blood"),
        E("77135-2", glu, ser, mol, "Glucose [Moles/volume] in Serum, Plasma or Blood"),
        E("2339-0", glu, wb, mass, "Glucose [Mass/volume] in Blood"),
        E("15074-8", glu, wb, mol, "Glucose [Moles/volume] in Blood"),
        E("41651-1", glu, wb, mass, "Glucose [Mass/volume] in Arterial blood"),
        E("39481-7", glu, wb, mol, "Glucose [Moles/volume] in Arterial blood"),
        E("41652-9", glu, wb, mass, "Glucose [Mass/volume] in Venous blood"),
        E("39480-9", glu, wb, mol, "Glucose [Moles/volume] in Venous blood"),
        E("32016-8", glu, wb, mass, "Glucose [Mass/volume] in Capillary blood"),
        E("51596-5", glu, wb, mol, "Glucose [Moles/volume] in Capillary blood"),
        E("41653-7", glu, poc, mass, "Glucose [Mass/volume] in Capillary blood by Glucometer"),
        E("14743-9", glu, poc, mol, "Glucose [Moles/volume] in Capillary blood by Glucometer"),
        E("2340-8", glu, poc, mass, "Glucose [Mass/volume] in Blood by Automated test strip"),
        E("72516-8", glu, poc, mol, "Glucose [Moles/volume] in Blood by Automated test strip"),
        E("2341-6", glu, poc, mass, "Glucose [Mass/volume] in Blood by Test strip manual"),
        E("2692-2", osm, ser, osmq, "Osmolality of Serum or Plasma"),
        # Code number of the calculated term is from memory (it passes the check digit); verify locally.
        E("18182-6", osm, ser, osmq, "Osmolality of Serum or Plasma by calculation", calculated=True),
        E("2695-5", osm, ur, osmq, "Osmolality of Urine"),
        E("3094-0", urea, ser, mass, "Urea nitrogen [Mass/volume] in Serum or Plasma"),
        E("14937-7", urea, ser, mol, "Urea nitrogen [Moles/volume] in Serum or Plasma"),
        E("6299-2", urea, wb, mass, "Urea nitrogen [Mass/volume] in Blood"),
        E("59570-2", urea, wb, mol, "Urea nitrogen [Moles/volume] in Blood"),
        E("3091-6", urea, ser, mass, "Urea [Mass/volume] in Serum or Plasma"),
        E("22664-7", urea, ser, mol, "Urea [Moles/volume] in Serum or Plasma"),
        # Calcium is context only: a very low calcium beside a very high potassium suggests K2EDTA
        # contamination of the sample (Cornes MP et al, Ann Clin Biochem 2008;45:601-603).
        # Code numbers from memory; both pass the check digit. Verify locally.
        E("2000-8", Analyte.CALCIUM, ser, mol, "Calcium [Moles/volume] in Serum or Plasma"),
        E("17861-6", Analyte.CALCIUM, ser, mass, "Calcium [Mass/volume] in Serum or Plasma"),
    )


CATALOGUE: dict[str, CatalogueEntry] = {e.code: e for e in _entries()}

# Urea nitrogen (BUN) and urea differ in mass per mole of urea: 28.014 g (2 N) vs 60.06 g.
UREA_NITROGEN_CODES = frozenset({"3094-0", "6299-2"})


def lookup(code: str) -> CatalogueEntry | None:
    """The catalogue entry for a LOINC code, or None for a code we do not watch."""
    return CATALOGUE.get(code)


def loinc_check_digit(base: str) -> int:
    """The LOINC mod-10 check digit of the digits before the hyphen (LOINC Users' Guide).

    Odd positions counted from the right are doubled as one number, the even positions are
    prepended, the digits summed; the check digit brings the sum up to a multiple of ten.
    """
    if not base.isdigit():
        raise ValueError(f"LOINC code body must be digits, got {base!r}")
    rev = base[::-1]
    odd = rev[0::2][::-1]
    even = rev[1::2][::-1]
    digits = even + str(int(odd) * 2)
    total = sum(int(d) for d in digits)
    return (10 - total % 10) % 10
