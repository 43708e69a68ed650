"""Delivery drill against a real receiver on 127.0.0.1: the demo ward's Flag changes reach a subscriber
registered through the API, through an outage of the receiver, numbered without gaps or duplicates."""

from __future__ import annotations

import socket
import threading
from collections.abc import Iterator
from datetime import timedelta
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import orjson
import pytest
from sqlalchemy import func, select

from service.clock import FixedClock
from service.config import Settings
from service.db.tables import DeliveryAttempt, FhirVersion
from service.demo import DEFAULT_FEED, read_feed, replay
from service.main import build_context
from tests.conftest import authorised_client
from tests.factories import HEADERS

pytestmark = pytest.mark.slow
SD = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"


class Receiver:
    """A subscriber's endpoint that can be taken down and brought back on the same port."""

    def __init__(self) -> None:
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = int(s.getsockname()[1])
        self.bodies: list[dict[str, Any]] = []
        self.server: ThreadingHTTPServer | None = None

    def up(self) -> None:
        bodies = self.bodies

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 - the http.server hook name
                length = int(self.headers.get("content-length", "0"))
                bodies.append(orjson.loads(self.rfile.read(length)))
                self.send_response(200)
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def down(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.server = None


@pytest.fixture
def receiver() -> Iterator[Receiver]:
    r = Receiver()
    r.up()
    yield r
    r.down()


def event_numbers(bodies: list[dict[str, Any]]) -> list[int]:
    numbers = []
    for body in bodies:
        params = {p["name"]: p for p in body["entry"][0]["resource"]["parameter"]}
        if params["type"]["valueCode"] == "event-notification":
            part = next(p for p in params["notification-event"]["part"] if p["name"] == "event-number")
            numbers.append(int(part["valueString"]))
    return numbers


def test_every_demo_flag_change_arrives_numbered_through_an_outage(tmp_path: Path, receiver: Receiver) -> None:
    arrivals = read_feed(DEFAULT_FEED)
    clock = FixedClock(arrivals[0][0])
    settings = Settings(data_dir=tmp_path, scheduler=False, allow_http_endpoints=True, delivery_base_seconds=1,
                        delivery_cap_seconds=30, delivery_max_attempts=1000)
    ctx = build_context(settings, clock=clock, http=httpx.Client())
    try:
        with authorised_client(ctx) as client:
            sub = {"resourceType": "Subscription", "status": "requested", "reason": "rapid-response pager",
                   "criteria": "https://lytestream.example/fhir/SubscriptionTopic/flag-changed",
                   "channel": {"type": "rest-hook", "endpoint": f"http://127.0.0.1:{receiver.port}/hook",
                               "payload": "application/fhir+json"}}
            assert client.post("/fhir/Subscription", content=orjson.dumps(sub), headers=HEADERS).status_code == 201
        ctx.dispatcher.run_once()
        outage = range(len(arrivals) // 3, 2 * len(arrivals) // 3)

        def between(i: int) -> None:
            if i == outage.start:
                receiver.down()
            if i == outage.stop:
                receiver.up()
            clock.advance(timedelta(seconds=31))  # past any retry wait
            ctx.dispatcher.run_once()

        replay(ctx, clock, arrivals, between=between)
        for _ in range(20):  # drain what is left, bounded
            clock.advance(timedelta(seconds=31))
            if ctx.dispatcher.run_once() == 0:
                break
        with ctx.db.session() as session:
            flag_versions = session.execute(select(func.count()).select_from(FhirVersion.__table__)
                                            .where(FhirVersion.__table__.c.resource_type == "Flag")).scalar_one()
            refused = session.execute(select(func.count()).select_from(DeliveryAttempt.__table__)
                                      .where(DeliveryAttempt.__table__.c.error == "connect")).scalar_one()
    finally:
        ctx.db.dispose()
    numbers = event_numbers(receiver.bodies)
    assert flag_versions > 10
    assert refused > 0  # the outage really refused deliveries
    assert sorted(set(numbers)) == list(range(1, flag_versions + 1))  # every change, no gap
    assert len(numbers) == len(set(numbers))  # no duplicates by number
    assert numbers == sorted(numbers)  # in order
