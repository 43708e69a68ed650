"""Builders for the FHIR resources the tests send. Invented values; no real patient data."""

from __future__ import annotations

from typing import Any

import orjson

LAB = "https://lab.example.org/result-id"
UCUM = "http://unitsofmeasure.org"
LOINC = "http://loinc.org"
HEADERS = {"content-type": "application/fhir+json"}


def observation(
    ident: str = "R1",
    *,
    code: str = "2951-2",
    value: float | None = 130,
    unit: str | None = "mmol/L",
    patient: str = "Patient/p1",
    effective: str = "2026-03-02T08:00:00+00:00",
    status: str = "final",
    issued: str | None = None,
    **extra: Any,
) -> dict[str, Any]:
    obs: dict[str, Any] = {
        "resourceType": "Observation",
        "identifier": [{"system": LAB, "value": ident}],
        "status": status,
        "code": {"coding": [{"system": LOINC, "code": code}]},
        "subject": {"reference": patient},
        "effectiveDateTime": effective,
    }
    if value is not None:
        obs["valueQuantity"] = {"value": value, "unit": unit, "system": UCUM, "code": unit}
    if issued:
        obs["issued"] = issued
    obs.update(extra)
    return obs


def insulin(
    ident: str = "M1",
    *,
    patient: str = "Patient/p1",
    start: str = "2026-03-02T06:00:00+00:00",
    end: str | None = None,
    status: str = "in-progress",
    atc: str = "A10AB01",
    route_code: str = "47625008",
) -> dict[str, Any]:
    period: dict[str, str] = {"start": start}
    if end:
        period["end"] = end
    return {
        "resourceType": "MedicationAdministration",
        "identifier": [{"system": "https://mar.example.org/admin-id", "value": ident}],
        "status": status,
        "medicationCodeableConcept": {"coding": [{"system": "http://www.whocc.no/atc", "code": atc}]},
        "subject": {"reference": patient},
        "effectivePeriod": period,
        "dosage": {"route": {"coding": [{"system": "http://snomed.info/sct", "code": route_code}]}},
    }


def bundle(kind: str, *resources: dict[str, Any], method: str = "POST", **extra: Any) -> dict[str, Any]:
    entries = []
    for r in resources:
        if method == "PUT" and r.get("identifier"):
            ident = r["identifier"][0]
            req = {"method": "PUT", "url": f"{r['resourceType']}?identifier={ident['system']}|{ident['value']}"}
        else:
            req = {"method": "POST", "url": r["resourceType"]}
        entries.append({"resource": r, "request": req})
    return {"resourceType": "Bundle", "type": kind, "entry": entries, **extra}


def dumps(body: Any) -> bytes:
    return orjson.dumps(body)
