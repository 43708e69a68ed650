"""Generated lab feeds for the benchmarks: invented patients and values, valid FHIR R4.

Every result is an Observation the way a hospital lab interface sends one: a business identifier,
a LOINC code, a UCUM quantity, a collection time with the lab's UTC offset, an issue time, a
reference range. Results come in draws (one patient, one collection time, several analytes) and
draws are spread over days in time order, as a feed delivers them. Nothing here is real data.
"""

from __future__ import annotations

import random
import uuid
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

import orjson

__all__ = [
    "ALL_RELEVANT",
    "BASIC_PANEL",
    "LAB_SYSTEM",
    "Analyte",
    "Feed",
    "draws",
    "make_feed",
    "transaction_bundle",
]

LAB_SYSTEM = "https://lab.example.org/result-id"
LOINC = "http://loinc.org"
UCUM = "http://unitsofmeasure.org"
# The lab clock runs one hour ahead of UTC; FHIR requires the offset on every time of day.
LAB_ZONE = timezone(timedelta(hours=1))
# The feed ends an hour before the benchmark starts and spans FEED_DAYS, so every result falls inside
# the rules' 72 h look-back: the rules judge real timelines (a feed dated long ago would take the
# late-result path, and a future one would be refused).
FEED_DAYS = 2.0
FEED_START = (datetime.now(LAB_ZONE) - timedelta(days=FEED_DAYS, hours=1)).replace(minute=0, second=0, microsecond=0)


@dataclass(frozen=True, slots=True)
class Analyte:
    """One test of a draw: what it is, its unit and the range its invented values fall in."""

    code: str
    display: str
    unit: str  # UCUM code, also used as the display unit
    low: float
    high: float
    decimals: int
    ref_low: float
    ref_high: float
    watched: bool  # in lytestream's catalogue (so triage keeps it)


_NA = Analyte("2951-2", "Sodium [Moles/volume] in Serum or Plasma", "mmol/L", 125, 150, 0, 135, 145, True)
_K = Analyte("2823-3", "Potassium [Moles/volume] in Serum or Plasma", "mmol/L", 2.8, 6.2, 1, 3.5, 5.1, True)
_GLU = Analyte("2345-7", "Glucose [Mass/volume] in Serum or Plasma", "mg/dL", 55, 420, 0, 70, 99, True)
_OSM = Analyte("2692-2", "Osmolality of Serum or Plasma", "mosm/kg", 262, 322, 0, 275, 295, True)
_BUN = Analyte("3094-0", "Urea nitrogen [Mass/volume] in Serum or Plasma", "mg/dL", 5, 60, 0, 7, 20, True)
_CL = Analyte("2075-0", "Chloride [Moles/volume] in Serum or Plasma", "mmol/L", 94, 114, 0, 98, 107, False)
_CO2 = Analyte("2028-9", "Carbon dioxide, total [Moles/volume] in Serum or Plasma", "mmol/L", 16, 32, 0,
               22, 29, False)
_CREA = Analyte("2160-0", "Creatinine [Mass/volume] in Serum or Plasma", "mg/dL", 0.5, 3.2, 2, 0.7, 1.3, False)
_CA = Analyte("17861-6", "Calcium [Mass/volume] in Serum or Plasma", "mg/dL", 7.6, 10.8, 1, 8.6, 10.3, True)

# Every analyte watched: an electrolyte and osmolality draw.
ALL_RELEVANT: tuple[Analyte, ...] = (_NA, _K, _GLU, _OSM, _BUN)
# A basic metabolic panel: five of eight are watched (calcium as context for the K2EDTA check).
BASIC_PANEL: tuple[Analyte, ...] = (_NA, _K, _GLU, _BUN, _CL, _CO2, _CREA, _CA)


@dataclass(frozen=True)
class Feed:
    """A feed ready to send: its results one by one and grouped in transaction Bundles."""

    name: str
    results: list[bytes]  # each Observation as JSON
    bundles: list[bytes]  # transaction Bundles as JSON, in feed order
    relevant: int  # results of watched codes (what the store should end up holding)
    patients: int

    @property
    def size(self) -> int:
        return len(self.results)


def _uuid(rng: random.Random) -> str:
    return str(uuid.UUID(int=rng.getrandbits(128), version=4))


def _instant(when: datetime) -> str:
    return when.isoformat(timespec="seconds")


def observation(
    analyte: Analyte, *, ident: str, patient: int, encounter: str, effective: datetime, issued: datetime,
    rng: random.Random,
) -> dict[str, Any]:
    """One final laboratory result as a lab interface sends it."""
    value = round(rng.uniform(analyte.low, analyte.high), analyte.decimals)
    if analyte.decimals == 0:
        value = int(value)
    quantity = {"value": value, "unit": analyte.unit, "system": UCUM, "code": analyte.unit}
    return {
        "resourceType": "Observation",
        "identifier": [{"system": LAB_SYSTEM, "value": ident}],
        "status": "final",
        "category": [{"coding": [{
            "system": "http://terminology.hl7.org/CodeSystem/observation-category",
            "code": "laboratory", "display": "Laboratory"}]}],
        "code": {"coding": [{"system": LOINC, "code": analyte.code, "display": analyte.display}],
                 "text": analyte.display.split(" [")[0]},
        "subject": {"reference": f"Patient/{patient}"},
        "encounter": {"reference": f"Encounter/{encounter}"},
        "effectiveDateTime": _instant(effective),
        "issued": _instant(issued),
        "performer": [{"reference": "Organization/central-lab"}],
        "valueQuantity": quantity,
        "referenceRange": [{
            "low": {"value": analyte.ref_low, "unit": analyte.unit, "system": UCUM, "code": analyte.unit},
            "high": {"value": analyte.ref_high, "unit": analyte.unit, "system": UCUM, "code": analyte.unit},
        }],
    }


def draws(
    panel: Sequence[Analyte], *, count: int, patients: int, start: datetime, days: float, prefix: str,
    rng: random.Random,
) -> Iterator[dict[str, Any]]:
    """``count`` draws of ``panel`` over ``days`` from ``start``, in collection order.

    Patients are numbered 1..``patients``; identifiers are ``<prefix>-<draw>-<test>``, so feeds with
    different prefixes never collide.
    """
    span = days * 86400.0
    offsets = sorted(rng.uniform(0.0, span) for _ in range(count))
    for n, offset in enumerate(offsets):
        patient = rng.randint(1, patients)
        effective = start + timedelta(seconds=int(offset))
        issued = effective + timedelta(minutes=rng.randint(25, 120))
        encounter = f"enc-{patient}-{int(offset // 86400)}"
        for t, analyte in enumerate(panel):
            yield observation(analyte, ident=f"{prefix}-{n:08d}-{t}", patient=patient, encounter=encounter,
                              effective=effective, issued=issued, rng=rng)


def transaction_bundle(resources: Sequence[dict[str, Any]], rng: random.Random) -> dict[str, Any]:
    """A transaction Bundle creating each resource (fullUrl as a lab interface sets it)."""
    return {
        "resourceType": "Bundle",
        "type": "transaction",
        "entry": [
            {"fullUrl": f"urn:uuid:{_uuid(rng)}", "resource": r,
             "request": {"method": "POST", "url": r["resourceType"]}}
            for r in resources
        ],
    }


def make_feed(
    name: str, panel: Sequence[Analyte], *, results: int, patients: int, bundle_size: int, seed: int,
    prefix: str | None = None, days: float = FEED_DAYS,
) -> Feed:
    """A feed of about ``results`` results (whole draws) in Bundles of ``bundle_size``."""
    rng = random.Random(seed)
    count = max(1, results // len(panel))
    resources = list(draws(panel, count=count, patients=patients, start=FEED_START, days=days,
                           prefix=prefix or name, rng=rng))
    bundles = [
        orjson.dumps(transaction_bundle(resources[i : i + bundle_size], rng))
        for i in range(0, len(resources), bundle_size)
    ]
    watched = {a.code for a in panel if a.watched}
    relevant = sum(1 for r in resources if r["code"]["coding"][0]["code"] in watched)
    return Feed(name=name, results=[orjson.dumps(r) for r in resources], bundles=bundles, relevant=relevant,
                patients=patients)
