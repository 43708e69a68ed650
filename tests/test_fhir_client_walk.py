"""A real FHIR client library (the SMART Python client, fhirclient 4.x, whose models are FHIR R4 4.0.1)
against a real server process: it parses what we serve with its own models, pages by following our ``next``
links, searches Flags and reads a Subscription.

Sodium 118 mmol/L stands for a result at or below the critical low of 120 mmol/L (RCPath G158 2017), so
each patient below has a sodium-critical-low Flag.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta

import httpx
import orjson
import pytest
from fhirclient.models.capabilitystatement import CapabilityStatement
from fhirclient.models.flag import Flag
from fhirclient.models.observation import Observation
from fhirclient.models.subscription import Subscription
from fhirclient.server import FHIRServer

from tests.api.test_subscriptions import subscription
from tests.factories import HEADERS, LOINC, bundle, dumps, observation
from tests.servers import clean_env, free_port, mint_token, start_server

pytestmark = pytest.mark.slow  # starts a server process


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[FHIRServer, str]]:
    data = tmp_path_factory.mktemp("fhirclient")
    port = free_port()
    base = f"http://127.0.0.1:{port}/fhir"
    token = mint_token(data)
    proc = start_server(port, "--data-dir", str(data),
                        env=clean_env(LYTESTREAM_BASE_URL=base, LYTESTREAM_SCHEDULER="false"))
    try:
        auth = {"Authorization": f"Bearer {token}"}
        # Collected an hour ago by the server's own clock: inside the look-back, so the Flags are active.
        drawn = (datetime.now(UTC) - timedelta(hours=1)).isoformat(timespec="seconds")
        feed = [observation(f"na-{i}", value=118 if i % 2 else 138, patient=f"Patient/p{i}", effective=drawn)
                for i in range(7)]
        r = httpx.post(base, content=dumps(bundle("transaction", *feed)), headers={**HEADERS, **auth}, timeout=30)
        assert r.status_code == 200, r.text
        r = httpx.post(f"{base}/Subscription", content=orjson.dumps(subscription()), headers={**HEADERS, **auth})
        assert r.status_code == 201, r.text
        server = FHIRServer(None, base_uri=base + "/")
        server.session.headers["Authorization"] = f"Bearer {token}"
        yield server, r.json()["id"]
        server.session.close()
    finally:
        proc.terminate()
        proc.wait(timeout=10)


def test_the_client_reads_the_capability_statement(served: tuple[FHIRServer, str]) -> None:
    server, _ = served
    capability = CapabilityStatement.read_from("metadata", server)
    assert capability.fhirVersion == "4.0.1"
    assert {r.type for r in capability.rest[0].resource} >= {"Observation", "Flag", "Subscription"}


def test_the_client_pages_through_every_observation_by_next_links(served: tuple[FHIRServer, str]) -> None:
    server, _ = served
    search = Observation.where({"code": f"{LOINC}|2951-2", "_count": "3"})
    bundles = list(search.perform_iter(server))
    ids = [e.resource.id for b in bundles for e in b.entry or [] if e.search.mode == "match"]
    assert len(bundles) == 3  # 7 results in pages of 3
    assert len(ids) == len(set(ids)) == 7


def test_the_client_searches_flags_by_rule_and_priority(served: tuple[FHIRServer, str]) -> None:
    server, _ = served
    search = Flag.where({"code": "sodium-critical-low", "priority": "PH", "status": "active"})
    flags = [r for r in search.perform_resources_iter(server) if r.resource_type == "Flag"]
    assert len(flags) == 3  # p1, p3, p5
    assert {f.subject.reference for f in flags} == {"Patient/p1", "Patient/p3", "Patient/p5"}


def test_the_client_reads_a_subscription_with_its_header_withheld(served: tuple[FHIRServer, str]) -> None:
    server, sid = served
    sub = Subscription.read(sid, server)
    assert sub.channel.type == "rest-hook"
    assert sub.channel.header == ["Authorization: (withheld)"]


def test_the_client_reads_a_flag_it_found(served: tuple[FHIRServer, str]) -> None:
    server, _ = served
    first = next(r for r in Flag.where({"_count": "1"}).perform_resources_iter(server) if r.resource_type == "Flag")
    again = Flag.read(first.id, server)
    assert (again.id, again.status) == (first.id, first.status)
