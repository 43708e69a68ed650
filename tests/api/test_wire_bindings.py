"""Required bindings and primitive JSON types of the elements lytestream reads are enforced, not coerced.

FHIR R4 JSON (https://hl7.org/fhir/R4/json.html#primitive): decimal and integer types are JSON numbers,
boolean is a JSON boolean, everything else a JSON string. Quantity.comparator is bound (required) to
QuantityComparator: <, <=, >=, > (https://hl7.org/fhir/R4/valueset-quantity-comparator.html).
"""

from __future__ import annotations

from typing import Any

import pytest
from fastapi.testclient import TestClient

from tests.factories import HEADERS, UCUM, bundle, dumps, observation


def post(client: TestClient, body: Any, path: str = "/fhir") -> Any:
    return client.post(path, content=dumps(body), headers=HEADERS)


def error(body: dict[str, Any]) -> dict[str, Any]:
    assert body["resourceType"] == "OperationOutcome"
    return next(i for i in body["issue"] if i["severity"] in ("error", "fatal"))


def sodium(ident: str, **quantity: Any) -> dict[str, Any]:
    # Sodium <=120 mmol/L is critical (RCPath G158 2017).
    q = {"value": 110, "unit": "mmol/L", "system": UCUM, "code": "mmol/L"} | quantity
    return observation(ident, valueQuantity=q)


def active_flags(client: TestClient) -> list[dict[str, Any]]:
    body = client.get("/fhir/Flag?_count=100&status=active").json()
    return [e["resource"] for e in body.get("entry", []) if e["search"]["mode"] == "match"]


@pytest.mark.parametrize("comparator", ["~", "=", "<>", "lt", ""])
def test_a_comparator_outside_the_required_value_set_is_refused(client: TestClient, comparator: str) -> None:
    r = post(client, sodium("cmp", comparator=comparator), "/fhir/Observation")
    assert r.status_code == 400, r.text
    issue = error(r.json())
    assert issue["expression"] == ["Observation.valueQuantity.comparator"]
    assert issue["code"] in ("code-invalid", "value")


@pytest.mark.parametrize("comparator", ["<", "<=", ">=", ">"])
def test_each_comparator_of_the_value_set_is_accepted(client: TestClient, comparator: str) -> None:
    assert post(client, sodium("cmp-ok", comparator=comparator), "/fhir/Observation").status_code == 201


def test_in_a_batch_a_bad_comparator_fails_alone_and_the_critical_sodium_raises_its_flag(client: TestClient) -> None:
    r = post(client, bundle("batch", sodium("cmp-bad", comparator="~"), sodium("na-critical", value=118)))
    assert [e["response"]["status"].split()[0] for e in r.json()["entry"]] == ["400", "201"]
    assert error(r.json()["entry"][0]["response"]["outcome"])["expression"] == [
        "Bundle.entry[0].resource.valueQuantity.comparator"]
    assert [f["code"]["coding"][0]["code"] for f in active_flags(client)] == ["sodium-critical-low"]


@pytest.mark.parametrize("value", ["140", "1e2", "NaN", "Infinity", ""])
def test_a_decimal_sent_as_a_json_string_is_refused(client: TestClient, value: str) -> None:
    r = post(client, sodium("str-decimal", value=value), "/fhir/Observation")
    assert r.status_code == 400, r.text
    assert error(r.json())["expression"] == ["Observation.valueQuantity.value"]
    assert client.get("/fhir/Observation?patient=Patient/p1").json().get("total") == 0


def test_a_decimal_sent_as_a_json_string_in_a_batch_names_the_entry(client: TestClient) -> None:
    r = post(client, bundle("batch", observation("ok"), sodium("str-decimal", value="140")))
    assert error(r.json()["entry"][1]["response"]["outcome"])["expression"] == [
        "Bundle.entry[1].resource.valueQuantity.value"]


@pytest.mark.parametrize(("element", "value", "where"), [
    ("valueBoolean", "true", "Observation.valueBoolean"),
    ("valueInteger", "3", "Observation.valueInteger"),
    ("component", [{"code": {"text": "haemolysis index"}, "valueQuantity": {"value": "2"}}],
     "Observation.component[0].valueQuantity.value"),
    ("referenceRange", [{"low": {"value": "135"}}], "Observation.referenceRange[0].low.value"),
])
def test_other_numbers_and_booleans_sent_as_strings_are_refused(client: TestClient, element: str, value: Any,
                                                               where: str) -> None:
    obs = observation("str-other", value=None) | {element: value}
    r = post(client, obs, "/fhir/Observation")
    assert r.status_code == 400, r.text
    assert error(r.json())["expression"] == [where]


def test_a_number_stays_a_json_number_when_served_back(client: TestClient) -> None:
    r = post(client, sodium("num", value=140.0), "/fhir/Observation")
    assert r.status_code == 201
    assert isinstance(r.json()["valueQuantity"]["value"], float)


@pytest.mark.parametrize("status", ["done", "FINAL", ""])
def test_an_administration_status_outside_its_value_set_is_refused(client: TestClient, status: str) -> None:
    from tests.factories import insulin

    r = post(client, insulin("M-status", status=status), "/fhir/MedicationAdministration")
    assert r.status_code == 400, r.text
    assert error(r.json())["expression"] == ["MedicationAdministration.status"]
