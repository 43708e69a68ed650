"""Every route and method the CapabilityStatement declares, walked with narrow tokens: a scope that does not
cover the request is refused, the exact scope that does is let through, and no token at all is a 401.

The walk is generated from ``GET /fhir/metadata``: every declared interaction and operation must have a
request below or the walk fails, and every route the app serves must be reached by the walk (or be one of the
public ones), so a new route cannot escape it.

Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017), so the
store holds a Flag to read.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson
import pytest
from fastapi.testclient import TestClient

from service.api.context import AppContext
from service.auth.scopes import INTERACTIONS
from service.clock import FixedClock
from service.config import Settings
from service.fhir.conformance import CONFORMANCE_TYPES
from service.main import build_context, create_app
from tests.api.test_subscriptions import subscription
from tests.conftest import authorised_client
from tests.factories import HEADERS, LAB, bundle, insulin, observation

PUBLIC = {("GET", "/fhir/metadata"), ("GET", "/healthz"), ("GET", "/readyz"),
          ("GET", "/.well-known/smart-configuration"), ("GET", "/fhir/.well-known/smart-configuration"),
          # The conformance resources the CapabilityStatement's canonicals name (tests/api/test_conformance.py).
          *(("GET", f"/fhir/{t}/{{rid}}") for t in CONFORMANCE_TYPES)}
CLIENT = "walker"  # every token of the walk names one client, so it owns the subscription it walks


@dataclass(frozen=True)
class Case:
    """One request, and the (type, interaction letter) pairs a token needs for it."""

    name: str
    method: str
    path: str
    needs: frozenset[tuple[str, str]]
    body: dict[str, Any] | None = None
    per_entry: bool = False  # a batch: the refusal is in the entry, not the HTTP status


def needs(*pairs: str) -> frozenset[tuple[str, str]]:
    """``needs("Flag.s", "AuditEvent.s")``; several letters after the dot mean all of them."""
    return frozenset((t, letter) for p in pairs for t, letters in [p.split(".")] for letter in letters)


BODIES = {"Observation": observation("walk-1", value=140), "MedicationAdministration": insulin("walk-m1"),
          "Subscription": subscription(content="id-only")}
CONDITIONS = {"Observation": f"identifier={LAB}|walk-1",
              "MedicationAdministration": "identifier=https://mar.example.org/admin-id|walk-m1"}


def resource_case(rtype: str, code: str, declared: dict[str, Any], ids: dict[str, str]) -> Case:
    base = f"/fhir/{rtype}"
    rid = ids.get(rtype, "not-held")
    if code == "read":
        return Case(f"{rtype} read", "GET", f"{base}/{rid}", needs(f"{rtype}.r"))
    if code == "vread":
        return Case(f"{rtype} vread", "GET", f"{base}/{rid}/_history/1", needs(f"{rtype}.r"))
    if code == "history-instance":
        return Case(f"{rtype} history", "GET", f"{base}/{rid}/_history", needs(f"{rtype}.r"))
    if code == "search-type":
        return Case(f"{rtype} search", "GET", base, needs(f"{rtype}.s"))
    if code == "create":
        return Case(f"{rtype} create", "POST", base, needs(f"{rtype}.c"), BODIES[rtype])
    if code == "update" and declared.get("conditionalUpdate"):
        # SMART App Launch 2.x: a conditional update may create, so it needs c as well as u.
        return Case(f"{rtype} conditional update", "PUT", f"{base}?{CONDITIONS[rtype]}", needs(f"{rtype}.cu"),
                    BODIES[rtype])
    if code == "update":
        return Case(f"{rtype} update", "PUT", f"{base}/{rid}", needs(f"{rtype}.u"), BODIES[rtype])
    if code == "delete":
        return Case(f"{rtype} delete", "DELETE", f"{base}/{rid}", needs(f"{rtype}.d"))
    raise AssertionError(f"the walk has no request for {rtype} {code!r}: add one")


def operation_case(rtype: str, name: str, ids: dict[str, str]) -> Case:
    rid = ids.get(rtype, "not-held")
    known = {
        ("Flag", "acknowledge"): Case("Flag $acknowledge", "POST", f"/fhir/Flag/{rid}/$acknowledge", needs("Flag.u")),
        ("Flag", "summary"): Case("Flag $summary", "GET", "/fhir/Flag/$summary?start=2026-03-01&end=2026-03-03",
                                  needs("Flag.s", "AuditEvent.s")),
        ("Subscription", "status"): Case("Subscription $status", "GET", f"/fhir/Subscription/{rid}/$status",
                                         needs("Subscription.r")),
        ("Subscription", "events"): Case("Subscription $events", "GET", f"/fhir/Subscription/{rid}/$events",
                                         needs("Subscription.r")),
    }
    if (rtype, name) not in known:
        raise AssertionError(f"the walk has no request for {rtype} ${name}: add one")
    return known[(rtype, name)]


def system_case(code: str) -> Case:
    entry = observation("walk-b1", value=140)
    if code == "transaction":
        return Case("transaction", "POST", "/fhir", needs("Observation.c"), bundle("transaction", entry))
    if code == "batch":
        return Case("batch", "POST", "/fhir", needs("Observation.c"), bundle("batch", entry), per_entry=True)
    raise AssertionError(f"the walk has no request for the system interaction {code!r}: add one")


_POLICY = (Path(__file__).resolve().parents[2] / "service" / "policy" / "default.toml").read_text("utf-8")


def system_operation_cases(name: str) -> list[Case]:
    if name == "backtest":  # the operation and the status URL it names
        body = {"resourceType": "Parameters", "parameter": [
            {"name": "start", "valueString": "2026-03-01"}, {"name": "end", "valueString": "2026-03-03"},
            {"name": "policy", "valueString": _POLICY}]}
        scope = needs("Flag.s", "AuditEvent.s")
        return [Case("$backtest", "POST", "/fhir/$backtest", scope, body),
                Case("$backtest status", "GET", "/fhir/$backtest-status/not-held", scope),
                Case("$backtest cancel", "DELETE", "/fhir/$backtest-status/not-held", scope)]
    raise AssertionError(f"the walk has no request for the system operation ${name}: add one")


def walk(capability: dict[str, Any], ids: dict[str, str]) -> list[Case]:
    (rest,) = capability["rest"]
    cases = [system_case(i["code"]) for i in rest.get("interaction", [])]
    cases += [c for op in rest.get("operation", []) for c in system_operation_cases(op["name"])]
    for declared in rest["resource"]:
        rtype = declared["type"]
        cases += [resource_case(rtype, i["code"], declared, ids) for i in declared.get("interaction", [])]
        cases += [operation_case(rtype, op["name"], ids) for op in declared.get("operation", [])]
    return cases


def scope_of(grants: set[tuple[str, str]]) -> str:
    by_type: dict[str, set[str]] = {}
    for rtype, letter in grants:
        by_type.setdefault(rtype, set()).add(letter)
    return " ".join(f"system/{t}.{''.join(c for c in INTERACTIONS if c in ls)}" for t, ls in sorted(by_type.items()))


def narrow_tokens(case: Case, types: list[str]) -> list[set[tuple[str, str]]]:
    """Grants that fall short of ``case.needs``: each needed pair alone (when more are needed), all but one,
    and everything else there is (every letter of every declared type but the ones needed)."""
    short: list[set[tuple[str, str]]] = []
    if len(case.needs) > 1:
        short += [{pair} for pair in sorted(case.needs)]
    short += [set(case.needs - {pair}) for pair in sorted(case.needs)]
    short.append({(t, c) for t in types for c in INTERACTIONS} - set(case.needs))
    return [s for s in short if s]


def refused(response: Any, case: Case) -> bool:
    if case.per_entry and response.status_code == 200:
        return bool(response.json()["entry"][0]["response"]["status"].startswith("403"))
    return bool(response.status_code == 403)


def send(client: TestClient, case: Case) -> Any:
    content = orjson.dumps(case.body) if case.body is not None else None
    return client.request(case.method, case.path, content=content, headers=HEADERS)


@pytest.fixture
def store(sqlite_url: str, tmp_path: Path, clock: FixedClock) -> Iterator[AppContext]:
    # One backend is enough here: the scope checks do not touch SQL. Refusals audited without limit.
    settings = Settings(database_url=sqlite_url, data_dir=tmp_path, base_url="http://testserver/fhir",
                        scheduler=False, refusal_audit_per_client=100_000, refusal_audit_overall=100_000)
    ctx = build_context(settings, clock=clock)
    yield ctx
    ctx.db.dispose()


def held_ids(ctx: AppContext) -> dict[str, str]:
    """One held resource of each type the walk reads, made by the walk's own client."""
    with authorised_client(ctx, client=CLIENT) as full:
        ids = {}
        for rtype, body in (("Observation", observation("walk-0", value=118)),
                            ("MedicationAdministration", insulin("walk-m0"))):
            r = full.post(f"/fhir/{rtype}", content=orjson.dumps(body), headers=HEADERS)
            ids[rtype] = r.headers["location"].split("/fhir/")[1].split("/")[1]
        ids["Flag"] = full.get("/fhir/Flag").json()["entry"][0]["resource"]["id"]
        r = full.post("/fhir/Subscription", content=orjson.dumps(subscription(content="id-only")), headers=HEADERS)
        ids["Subscription"] = r.json()["id"]
    return ids


def test_every_declared_request_is_refused_to_a_scope_that_does_not_cover_it(store: AppContext) -> None:
    anonymous = TestClient(create_app(context=store))
    capability = anonymous.get("/fhir/metadata").json()
    types = [r["type"] for r in capability["rest"][0]["resource"]]
    cases = walk(capability, held_ids(store))
    let_through: list[str] = []
    for case in cases:
        assert send(anonymous, case).status_code == 401, f"{case.name} without a token"
        for grants in narrow_tokens(case, types):
            with authorised_client(store, scope=scope_of(grants), client=CLIENT) as narrow:
                if not refused(send(narrow, case), case):
                    let_through.append(f"{case.name} with {scope_of(grants)}")
    assert let_through == []


def test_every_declared_request_is_let_through_with_exactly_its_scope(store: AppContext) -> None:
    capability = TestClient(create_app(context=store)).get("/fhir/metadata").json()
    refusals: list[str] = []
    for case in walk(capability, held_ids(store)):
        with authorised_client(store, scope=scope_of(set(case.needs)), client=CLIENT) as exact:
            r = send(exact, case)
        if r.status_code in (401, 403) or refused(r, case):
            refusals.append(f"{case.name} with {scope_of(set(case.needs))}: {r.status_code} {r.text[:200]}")
    assert refusals == []


def test_the_walk_reaches_every_route_the_app_serves(store: AppContext) -> None:
    app = create_app(context=store)
    reached: set[tuple[str, str]] = set()

    async def noting_the_route(scope: Any, receive: Any, send_: Any) -> None:
        await app(scope, receive, send_)
        if scope["type"] == "http" and scope.get("route") is not None:  # set by the router that served it
            reached.add((scope["method"], scope["route"].path))

    anonymous = TestClient(noting_the_route)
    capability = anonymous.get("/fhir/metadata").json()
    for case in walk(capability, {"Observation": "o", "MedicationAdministration": "m", "Flag": "f",
                                  "Subscription": "s"}):
        send(anonymous, case)  # routing comes before the token check: a 401 still names its route
    served = {(method.upper(), path) for path, ops in app.openapi()["paths"].items() for method in ops}
    assert ("GET", "/fhir/{rtype}/{rid}") in served  # the description lists every route, shared ones too
    assert served - reached - PUBLIC == set()
