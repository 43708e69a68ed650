"""Every canonical the CapabilityStatement cites resolves: ours are served at their FHIR read path (and are
valid R4B), the rest are published by HL7 or the SMART registry. A canonical added later that is neither
fails here.

Canonical URLs and their resolution: R4 references.html#canonical; conformance resources are read as any
other resource (http.html#read).
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from fhir.resources.R4B.codesystem import CodeSystem
from fhir.resources.R4B.operationdefinition import OperationDefinition
from fhir.resources.R4B.parameters import Parameters
from fhir.resources.R4B.searchparameter import SearchParameter
from fhir.resources.R4B.structuredefinition import StructureDefinition
from fhir.resources.R4B.subscriptiontopic import SubscriptionTopic

from service.api.context import AppContext
from service.auth.settings import AuthSettings
from service.clock import FixedClock
from service.config import Settings
from service.fhir.flag_render import CANONICAL_BASE
from service.main import build_context, create_app
from tests.factories import HEADERS, bundle, dumps, observation

R4B_MODELS: dict[str, Any] = {"SearchParameter": SearchParameter, "OperationDefinition": OperationDefinition,
                              "CodeSystem": CodeSystem, "SubscriptionTopic": SubscriptionTopic,
                              "StructureDefinition": StructureDefinition}

# Canonicals published by others, each with where it is defined.
PUBLISHED = {
    # HL7 Subscriptions R5 Backport IG 1.1.0 (http://hl7.org/fhir/uv/subscriptions-backport/).
    "http://hl7.org/fhir/uv/subscriptions-backport/OperationDefinition/backport-subscription-status",
    "http://hl7.org/fhir/uv/subscriptions-backport/OperationDefinition/backport-subscription-events",
    "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition/"
    "capabilitystatement-subscriptiontopic-canonical",
    # HL7 terminology (https://terminology.hl7.org/CodeSystem-restful-security-service.html).
    "http://terminology.hl7.org/CodeSystem/restful-security-service",
    # LOINC's system URI (R4 terminologies-systems.html).
    "http://loinc.org",
    # SMART App Launch 2.x, "Conformance": the oauth-uris extension of the CapabilityStatement.
    "http://fhir-registry.smarthealthit.org/StructureDefinition/oauth-uris",
}
_URL = re.compile(r"https?://[^\s\"'()<>,;|]+")  # "system|code" in text names the system


def cited(node: Any) -> Iterator[str]:
    """Every URL anywhere in the resource, element values and URLs named in text alike, but endpoints
    (``valueUri``: the oauth-uris token and authorize endpoints), which are addresses, not canonicals."""
    if isinstance(node, dict):
        for key, value in node.items():
            if key != "valueUri":
                yield from cited(value)
    elif isinstance(node, list):
        for value in node:
            yield from cited(value)
    elif isinstance(node, str):
        yield from (m.rstrip(".:") for m in _URL.findall(node))


@pytest.fixture(params=["minted", "jwt"])
def server(request: pytest.FixtureRequest, tmp_path: Path, clock: FixedClock) -> Iterator[TestClient]:
    auth = AuthSettings() if request.param == "minted" else AuthSettings(
        mode="jwt", issuer="https://auth.hospital.test", audience="http://testserver/fhir",
        jwks_url="https://auth.hospital.test/jwks", token_endpoint="https://auth.hospital.test/token")
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'db.sqlite'}", data_dir=tmp_path, scheduler=False,
                        base_url="http://testserver/fhir", auth=auth)
    ctx = build_context(settings, clock=clock)
    with TestClient(create_app(context=ctx)) as anonymous:
        yield anonymous
    ctx.db.dispose()


def ours(canonical: str) -> str:
    """The read path of one of our canonicals: the same [type]/[id] under this server's base."""
    return "/fhir" + canonical.removeprefix(CANONICAL_BASE)


def test_every_canonical_the_capability_statement_cites_resolves(server: TestClient) -> None:
    capability = server.get("/fhir/metadata").json()
    base = capability["implementation"]["url"]
    unresolved = []
    for url in sorted(set(cited(capability)) - {base}):
        if url in PUBLISHED:
            continue
        if not url.startswith(CANONICAL_BASE + "/"):
            unresolved.append(f"{url}: neither ours nor published")
            continue
        r = server.get(ours(url))
        if r.status_code != 200 or r.json().get("url") != url:
            unresolved.append(f"{url}: {r.status_code}")
    assert unresolved == []


def test_every_served_conformance_resource_is_valid_r4b(server: TestClient) -> None:
    capability = server.get("/fhir/metadata").json()
    served = sorted(u for u in set(cited(capability)) if u.startswith(CANONICAL_BASE + "/"))
    assert len(served) >= 8  # 4 search parameters, 2 operations, 3 topics, the rule code system
    for url in served:
        body = server.get(ours(url)).json()
        R4B_MODELS[body["resourceType"]].model_validate(body)


def test_flag_detail_is_declared_as_a_search_parameter(server: TestClient) -> None:
    capability = server.get("/fhir/metadata").json()
    flag = next(r for r in capability["rest"][0]["resource"] if r["type"] == "Flag")
    (declared,) = [p for p in flag["searchParam"] if p["name"] == "detail"]
    param = server.get(ours(declared["definition"])).json()
    assert (param["resourceType"], param["code"], param["type"], param["base"]) == (
        "SearchParameter", "detail", "reference", ["Flag"])
    # R4: the flag-detail extension (http://hl7.org/fhir/StructureDefinition/flag-detail) is what it reads.
    assert "http://hl7.org/fhir/StructureDefinition/flag-detail" in param["expression"]
    assert "Flag:detail" in flag["searchInclude"]


def test_the_rule_code_system_holds_every_rule_code(server: TestClient) -> None:
    from service.domain.findings import Rule

    system = server.get("/fhir/CodeSystem/rule").json()
    assert {c["code"] for c in system["concept"]} == {r.value for r in Rule}


def test_an_unknown_conformance_resource_is_a_404(server: TestClient) -> None:
    r = server.get("/fhir/SearchParameter/Flag-nothing")
    assert r.status_code == 404 and r.json()["resourceType"] == "OperationOutcome"


def test_a_flag_search_by_detail_finds_the_flag_citing_that_result(client: TestClient) -> None:
    # Sodium 118 mmol/L is at or below the critical low of 120 mmol/L (RCPath G158 2017): one Flag.
    r = client.post("/fhir", content=dumps(bundle("batch", observation("na", value=118))), headers=HEADERS)
    assert r.status_code == 200
    rid = r.json()["entry"][0]["response"]["location"].split("/")[1]
    assert client.get(f"/fhir/Flag?detail=Observation/{rid}").json()["total"] == 1
    assert client.get("/fhir/Flag?detail=Observation/other").json()["total"] == 0


# ------------------------------------------------------------------------------------------ $summary


def test_summary_answers_a_parameters_resource_as_fhir_json(context: AppContext) -> None:
    from tests.conftest import authorised_client

    with authorised_client(context) as c:
        r = c.get("/fhir/Flag/$summary?start=2026-03-01&end=2026-03-03")
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("application/fhir+json")
    body = r.json()
    Parameters.model_validate(body)
    names = {p["name"] for p in body["parameter"]}
    assert {"start", "end", "flags_raised", "alert_burden", "caution"} <= names


def test_every_summary_parameter_is_declared_by_its_operation_definition(client: TestClient) -> None:
    declared = client.get("/fhir/OperationDefinition/Flag-summary").json()["parameter"]
    outs = {p["name"] for p in declared if p["use"] == "out"}
    answered = client.get("/fhir/Flag/$summary?start=2026-03-01&end=2026-03-03").json()["parameter"]
    assert {p["name"] for p in answered} - outs == set()
