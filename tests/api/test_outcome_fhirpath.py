"""Each OperationOutcome expression is FHIRPath that selects exactly the offending element of what was sent.

Evaluated with fhirpathpy (the R4 model, so choice elements resolve) against the resource or Bundle sent:
an element that is present and wrong is selected as exactly one node holding the value sent; an element
that is missing selects nothing, and its parent (the expression without its last step) exactly one node.
FHIRPath: https://hl7.org/fhirpath/N1/ ; OperationOutcome.issue.expression: https://hl7.org/fhir/R4/operationoutcome.html
"""

from __future__ import annotations

import copy
import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import pytest
from fastapi.testclient import TestClient
from fhirpathpy import evaluate
from fhirpathpy.models import models

from tests.factories import HEADERS, UCUM, bundle, dumps, insulin, observation

R4 = models["r4"]
MISSING = object()


@dataclass(frozen=True)
class Fault:
    name: str
    body: Callable[[], dict[str, Any]]
    path: str  # the endpoint
    expression: str  # the element that is at fault
    sent: Any = MISSING  # what that element holds in the body, or MISSING
    diagnostics: str = ""  # a word the message must carry


def changed(make: Callable[[], dict[str, Any]], **changes: Any) -> Callable[[], dict[str, Any]]:
    """A builder of ``make()`` with elements replaced, or removed where the value is MISSING."""
    def build() -> dict[str, Any]:
        resource = make()
        for key, value in changes.items():
            if value is MISSING:
                resource.pop(key, None)
            else:
                resource[key] = value
        return resource
    return build


def obs(**changes: Any) -> Callable[[], dict[str, Any]]:
    return changed(lambda: observation("fp-1"), **changes)


def quantity(**q: Any) -> dict[str, Any]:
    return {"value": 118, "unit": "mmol/L", "system": UCUM, "code": "mmol/L"} | q


def in_batch(build: Callable[[], dict[str, Any]], change: Callable[[dict[str, Any]], None] | None = None
             ) -> Callable[[], dict[str, Any]]:
    def make() -> dict[str, Any]:
        b = bundle("batch", observation("fp-ok"), build())
        if change is not None:
            change(b)
        return b
    return make


def set_at(*keys: Any, value: Any) -> Callable[[dict[str, Any]], None]:
    def change(b: dict[str, Any]) -> None:
        node: Any = b
        for k in keys[:-1]:
            node = node[k]
        node[keys[-1]] = value
    return change


def administration(**changes: Any) -> Callable[[], dict[str, Any]]:
    return changed(lambda: insulin("fp-m"), **changes)


O, M = "/fhir/Observation", "/fhir/MedicationAdministration"
FAULTS = [
    Fault("effectiveDateTime malformed", obs(effectiveDateTime="2026-13-45T08:00:00Z"), O,
          "Observation.effectiveDateTime", "2026-13-45T08:00:00Z"),
    Fault("effectiveDateTime without a time", obs(effectiveDateTime="2026-03-02"), O,
          "Observation.effectiveDateTime", "2026-03-02"),
    Fault("effectiveDateTime without an offset", obs(effectiveDateTime="2026-03-02T08:00:00"), O,
          "Observation.effectiveDateTime", "2026-03-02T08:00:00"),
    Fault("effectiveDateTime in the future", obs(effectiveDateTime="2026-03-03T08:00:00Z"), O,
          "Observation.effectiveDateTime", "2026-03-03T08:00:00Z"),
    Fault("effectiveDateTime out of range", obs(effectiveDateTime="0001-01-01T00:00:00+14:00"), O,
          "Observation.effectiveDateTime", "0001-01-01T00:00:00+14:00"),
    Fault("effectivePeriod.start without a time", obs(effectiveDateTime=MISSING, effectivePeriod={"start": "2026-03-02"}),
          O, "Observation.effectivePeriod.start", "2026-03-02"),
    Fault("effective missing", obs(effectiveDateTime=MISSING), O, "Observation.effective"),
    Fault("issued out of range", obs(issued="9999-12-31T23:59:59-14:00"), O, "Observation.issued",
          "9999-12-31T23:59:59-14:00"),
    Fault("comparator outside the value set", obs(valueQuantity=quantity(comparator="~")), O,
          "Observation.valueQuantity.comparator", "~", "~"),
    Fault("decimal as a string", obs(valueQuantity=quantity(value="140")), O, "Observation.valueQuantity.value", "140"),
    Fault("unit not accepted", obs(valueQuantity=quantity(unit="mg/dL", code="mg/dL")), O,
          "Observation.valueQuantity.code", "mg/dL"),
    Fault("unit code without UCUM", obs(valueQuantity=quantity(system="http://example.org")), O,
          "Observation.valueQuantity.system", "http://example.org"),
    Fault("status outside the value set", obs(status="done"), O, "Observation.status", "done", "done"),
    Fault("status missing", obs(status=MISSING), O, "Observation.status"),
    Fault("status a number", obs(status=5), O, "Observation.status", 5),
    Fault("code missing", obs(code=MISSING), O, "Observation.code"),
    Fault("code empty", obs(code={}), O, "Observation.code", {}),
    Fault("unit a number", obs(valueQuantity=quantity(unit=5)), O, "Observation.valueQuantity.unit", 5),
    Fault("identifier missing", obs(identifier=MISSING), O, "Observation.identifier"),
    Fault("identifier system a number", obs(identifier=[{"system": 5, "value": "x"}]), O,
          "Observation.identifier[0].system", 5),
    Fault("subject missing", obs(subject=MISSING), O, "Observation.subject"),
    Fault("subject not a Patient", obs(subject={"reference": "Group/g1"}), O, "Observation.subject.reference",
          "Group/g1"),
    Fault("unknown element", obs(triggeredBy=[{"type": "reflex"}]), O, "Observation.triggeredBy", [{"type": "reflex"}]),
    Fault("unknown element, not an identifier", obs(**{"foo bar": 1}), O, "Observation.`foo bar`", 1),
    Fault("contained of an unknown type", obs(contained=[{"resourceType": "Nope", "id": "n"}]), O,
          "Observation.contained[0].resourceType", "Nope"),
    Fault("boolean as a string", obs(valueQuantity=MISSING, valueBoolean="true"), O, "Observation.valueBoolean", "true"),
    Fault("administration status outside the value set", administration(status="given"), M,
          "MedicationAdministration.status", "given", "given"),
    Fault("administration start without a time", administration(effectivePeriod={"start": "2026-03-02"}), M,
          "MedicationAdministration.effectivePeriod.start", "2026-03-02"),
    Fault("administration effective missing", administration(effectivePeriod=MISSING), M,
          "MedicationAdministration.effective"),
    Fault("comparator in a batch entry", in_batch(obs(valueQuantity=quantity(comparator="~"))), "/fhir",
          "Bundle.entry[1].resource.valueQuantity.comparator", "~"),
    Fault("decimal as a string in a batch entry", in_batch(obs(valueQuantity=quantity(value="118"))), "/fhir",
          "Bundle.entry[1].resource.valueQuantity.value", "118"),
    Fault("request.method PATCH", in_batch(obs(), set_at("entry", 1, "request", "method", value="PATCH")), "/fhir",
          "Bundle.entry[1].request.method", "PATCH", "PATCH"),
    Fault("request.method HEAD", in_batch(obs(), set_at("entry", 1, "request", "method", value="HEAD")), "/fhir",
          "Bundle.entry[1].request.method", "HEAD", "HEAD"),
    Fault("request.method outside http-verb", in_batch(obs(), set_at("entry", 1, "request", "method", value="post")),
          "/fhir", "Bundle.entry[1].request.method", "post", "post"),
    Fault("request.url a number", in_batch(obs(), set_at("entry", 1, "request", "url", value=7)), "/fhir",
          "Bundle.entry[1].request.url", 7),
    Fault("request.url for another type", in_batch(obs(), set_at("entry", 1, "request", "url", value="Patient")),
          "/fhir", "Bundle.entry[1].request.url", "Patient"),
    Fault("fullUrl a list", in_batch(obs(), set_at("entry", 1, "fullUrl", value=["urn:uuid:x"])), "/fhir",
          "Bundle.entry[1].fullUrl", ["urn:uuid:x"]),
    Fault("request missing", in_batch(obs(), lambda b: b["entry"][1].pop("request")), "/fhir",
          "Bundle.entry[1].request"),
    Fault("Bundle.type collection", lambda: bundle("collection", observation("fp-1")), "/fhir", "Bundle.type",
          "collection"),
]


def error_expressions(response: Any) -> list[tuple[str, str]]:
    body = response.json()
    if body.get("resourceType") == "Bundle":
        outcomes = [e["response"]["outcome"] for e in body["entry"] if "outcome" in e["response"]]
    else:
        outcomes = [body]
    return [(x, i.get("diagnostics", "")) for o in outcomes for i in o["issue"]
            if i["severity"] in ("error", "fatal") for x in i.get("expression", [])]


def parent(expression: str) -> str:
    return re.sub(r"(\.[A-Za-z_][A-Za-z0-9_]*|\.`[^`]*`|\[\d+\])$", "", expression)


@pytest.mark.parametrize("fault", FAULTS, ids=[f.name for f in FAULTS])
def test_the_outcome_expression_selects_exactly_the_offending_element(client: TestClient, fault: Fault) -> None:
    sent = fault.body()
    r = client.post(fault.path, content=dumps(sent), headers=HEADERS)
    assert 400 <= r.status_code < 500 or r.status_code == 200, r.text
    found = error_expressions(r)
    assert [x for x, _ in found] == [fault.expression], r.text
    (_, diagnostics), = found
    assert fault.diagnostics in diagnostics
    resource = copy.deepcopy(sent)
    selected = evaluate(resource, fault.expression, model=R4)
    if fault.sent is MISSING:
        assert selected == []
        assert len(evaluate(resource, parent(fault.expression), model=R4)) == 1
    else:
        # FHIRPath selects the items of a repeating element: a list sent is its items.
        assert selected == (fault.sent if isinstance(fault.sent, list) else [fault.sent])


def test_two_values_name_each_variant_sent_and_each_selects_one_node(client: TestClient) -> None:
    sent = observation("fp-2", valueString="high")
    r = client.post("/fhir/Observation", content=dumps(sent), headers=HEADERS)
    expressions = [x for x, _ in error_expressions(r)]
    assert expressions == ["Observation.valueQuantity", "Observation.valueString"]
    assert [evaluate(sent, x, model=R4) for x in expressions] == [[sent["valueQuantity"]], ["high"]]


def test_a_suspect_code_warning_in_a_batch_names_that_entry_code(client: TestClient) -> None:
    # 2951-3 fails the LOINC mod-10 check digit (2951-2 is serum sodium; LOINC Users' Guide).
    sent = bundle("batch", observation("fp-ok"), observation("fp-typo", code="2951-3"))
    r = client.post("/fhir", content=dumps(sent), headers=HEADERS)
    (warning,) = [i for i in r.json()["entry"][1]["response"]["outcome"]["issue"] if i["severity"] == "warning"]
    assert warning["expression"] == ["Bundle.entry[1].resource.code"]
    assert evaluate(sent, warning["expression"][0], model=R4) == [sent["entry"][1]["resource"]["code"]]
