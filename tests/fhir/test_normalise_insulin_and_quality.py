"""What the FHIR boundary reads from an insulin administration and from a sample's quality remarks.

Route codes: SNOMED CT 47625008 "Intravenous route" and 34206005 "Subcutaneous route" (from memory);
HL7 v2 table 0162 IV / SC (HL7 v2.5.1, from memory); a MedicationAdministration with
dosage.rateQuantity or dosage.rateRatio is an infusion (FHIR R4 MedicationAdministration.dosage.rate[x]).
Specimen condition HEM "Hemolyzed": HL7 v2 table 0493 (from memory).
"""

from __future__ import annotations

from typing import Any

import pytest

from service.domain.insulin import InsulinCodes
from service.fhir.normalise import normalise_insulin, sample_quality
from tests.factories import insulin, observation


def route_of(dosage: dict[str, Any]) -> str | None:
    resource = insulin() | {"dosage": dosage}
    found = normalise_insulin(resource, InsulinCodes(), "MedicationAdministration")
    assert found is not None
    return found.route


@pytest.mark.parametrize(
    ("coding", "route"),
    [
        ({"system": "http://snomed.info/sct", "code": "47625008"}, "intravenous"),
        ({"system": "http://snomed.info/sct", "code": "34206005"}, "subcutaneous"),
        ({"system": "http://terminology.hl7.org/CodeSystem/v2-0162", "code": "IV"}, "intravenous"),
        ({"system": "http://terminology.hl7.org/CodeSystem/v2-0162", "code": "SC"}, "subcutaneous"),
        ({"code": "IV"}, "intravenous"),
    ],
)
def test_coded_routes_are_recognised(coding: dict[str, str], route: str) -> None:
    assert route_of({"route": {"coding": [coding]}}) == route


@pytest.mark.parametrize(
    "rate",
    [
        {"rateQuantity": {"value": 6, "unit": "U/h", "system": "http://unitsofmeasure.org", "code": "[iU]/h"}},
        {"rateRatio": {"numerator": {"value": 6}, "denominator": {"value": 1, "code": "h"}}},
    ],
)
def test_a_rate_makes_an_infusion_whatever_the_route_text(rate: dict[str, Any]) -> None:
    assert route_of({"route": {"text": "line 2"}, **rate}) == "intravenous"
    assert route_of(rate) == "intravenous"


def test_a_coded_subcutaneous_route_with_a_rate_stays_subcutaneous() -> None:
    # an insulin pump: a basal rate given under the skin
    dosage = {"route": {"coding": [{"system": "http://snomed.info/sct", "code": "34206005"}]},
              "rateQuantity": {"value": 1}}
    assert route_of(dosage) == "subcutaneous"


def test_a_contained_specimen_with_condition_hem_is_haemolysed() -> None:
    resource = observation("k1", code="2823-3", value=6.8) | {
        "contained": [{"resourceType": "Specimen", "id": "s1", "condition": [
            {"coding": [{"system": "http://terminology.hl7.org/CodeSystem/v2-0493", "code": "HEM"}]}]}],
        "specimen": {"reference": "#s1"},
    }
    assert sample_quality(resource) == "haemolysed (specimen condition HEM)"


@pytest.mark.parametrize(
    ("extra", "quality"),
    [
        ({"note": [{"text": "Sample grossly haemolysed"}]}, "haemolysed (note)"),
        ({"note": [{"text": "hemolyzed specimen"}]}, "haemolysed (note)"),
        ({"interpretation": [{"text": "Hemolysis present"}]}, "haemolysed (interpretation)"),
        ({"component": [{"code": {"text": "Haemolysis index"}, "valueQuantity": {"value": 2}}]},
         "haemolysis index 2"),
        ({"component": [{"code": {"text": "Haemolysis index"}, "valueQuantity": {"value": 0}}]}, None),
        ({"note": [{"text": "repeat requested"}]}, None),
    ],
)
def test_quality_remarks_the_lab_sends(extra: dict[str, Any], quality: str | None) -> None:
    assert sample_quality(observation("k1", code="2823-3", value=6.8) | extra) == quality
