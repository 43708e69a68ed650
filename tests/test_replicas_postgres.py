"""Two service processes on one PostgreSQL: every outbox row is delivered once, by one of them,
and a replica killed mid-run has its subscriptions taken over within the bound.

The drills run real `lytestream serve` processes against a real receiver on 127.0.0.1 and count
what arrives per subscription and event number, so a row sent by both replicas shows up as a count
of two. Thousands of rows matter: a lease that expires while its holder is still draining only
shows once draining takes longer than the lease. The figures are printed (`-s` shows them).
"""

# Sodium 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so each one raises sodium-critical-low,
# a high-priority Flag, on a patient of its own: one event per subscription per result.

from __future__ import annotations

import contextlib
import socket
import subprocess
import sys
import threading
import time
from collections import Counter, defaultdict
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import httpx
import orjson
import pytest
from sqlalchemy import create_engine, text

from tests.factories import HEADERS, bundle, dumps, observation
from tests.servers import clean_env, free_port, start_server
from tests.stores import flag_signatures

pytestmark = [pytest.mark.slow, pytest.mark.postgres]

SUBSCRIPTIONS = 4
RESULTS = 1500  # x 4 subscriptions = 6,000 numbered notifications
PER_BUNDLE = 100
# The crash drill: 1,250 x 4 = 5,000 notifications with one replica killed, then 25 x 4 more
# queued while the receiver is down.
CRASH_RESULTS = 1250
OUTAGE_RESULTS = 25
OUTAGE_S = 20.0
BOUND_S = 15.0  # the longest a high-priority Flag's page may wait once a replica could send it


def stop(procs: list[subprocess.Popen[bytes]], receiver: CountingReceiver) -> None:
    """Stop the service processes still running, then the receiver."""
    for p in procs:
        if p.poll() is None:
            p.terminate()
            p.wait(timeout=20)
    receiver.down()


@dataclass
class Arrival:
    at: float  # time.monotonic() on arrival
    subscription: str
    number: int


@dataclass
class CountingReceiver:
    """A subscriber endpoint that records (subscription, event number, arrival time) for each event."""

    port: int = field(default_factory=free_port)
    arrivals: list[Arrival] = field(default_factory=list)
    server: ThreadingHTTPServer | None = None
    connections: set[socket.socket] = field(default_factory=set)

    def up(self) -> None:
        arrivals, connections = self.arrivals, self.connections

        class Handler(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"  # keep-alive, as a real endpoint would

            def setup(self) -> None:
                super().setup()
                connections.add(self.connection)

            def do_POST(self) -> None:  # noqa: N802 - the http.server hook name
                body = orjson.loads(self.rfile.read(int(self.headers.get("content-length", "0"))))
                params = {p["name"]: p for p in body["entry"][0]["resource"]["parameter"]}
                if params["type"]["valueCode"] == "event-notification":
                    sid = params["subscription"]["valueReference"]["reference"].rsplit("/", 1)[1]
                    part = next(p for p in params["notification-event"]["part"] if p["name"] == "event-number")
                    arrivals.append(Arrival(time.monotonic(), sid, int(part["valueString"])))
                self.send_response(200)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def down(self) -> None:
        """Stop listening and cut every open connection: the endpoint is gone."""
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.server = None
        for conn in list(self.connections):
            with contextlib.suppress(OSError):
                conn.shutdown(socket.SHUT_RDWR)
        self.connections.clear()

    def counts(self) -> dict[str, Counter[int]]:
        per: dict[str, Counter[int]] = defaultdict(Counter)
        for a in list(self.arrivals):
            per[a.subscription][a.number] += 1
        return per


def env(database_url: str, **extra: str) -> dict[str, str]:
    return clean_env(LYTESTREAM_DATABASE_URL=database_url, LYTESTREAM_ALLOW_HTTP_ENDPOINTS="true",
                     LYTESTREAM_RECHECK_SECONDS="3600", **extra)


def cli(database_url: str, *args: str) -> str:
    out = subprocess.run([sys.executable, "-m", "service", *args], capture_output=True, text=True, check=True,
                         env=env(database_url))
    return out.stdout.strip()


@dataclass
class Drill:
    database_url: str
    receiver: CountingReceiver
    ports: list[int]
    procs: list[subprocess.Popen[bytes]]
    auth: dict[str, str]
    subscriptions: list[str] = field(default_factory=list)

    def subscribe(self, n: int) -> None:
        for i in range(n):
            sub = {"resourceType": "Subscription", "status": "requested", "reason": f"pager {i}",
                   "criteria": "https://lytestream.example/fhir/SubscriptionTopic/flag-changed",
                   "channel": {"type": "rest-hook", "endpoint": f"http://127.0.0.1:{self.receiver.port}/hook",
                               "payload": "application/fhir+json"}}
            r = httpx.post(f"http://127.0.0.1:{self.ports[i % 2]}/fhir/Subscription", content=orjson.dumps(sub),
                           headers=self.auth, timeout=30)
            assert r.status_code == 201
            self.subscriptions.append(r.json()["id"])

    def send_results(self, start: int, count: int, ports: list[int] | None = None) -> None:
        """``count`` critical results, each for a new patient, in batches spread over the replicas."""
        ports = ports or self.ports
        now = time.time()

        def post(first: int) -> int:
            obs = [observation(f"r{i}", value=115, patient=f"Patient/p{i}",
                               effective=time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime(now - 3600)))
                   for i in range(first, min(first + PER_BUNDLE, start + count))]
            port = ports[(first // PER_BUNDLE) % len(ports)]
            return httpx.post(f"http://127.0.0.1:{port}/fhir", content=dumps(bundle("batch", *obs)),
                              headers=self.auth, timeout=60).status_code

        with ThreadPoolExecutor(max_workers=2) as pool:
            assert set(pool.map(post, range(start, start + count, PER_BUNDLE))) == {200}

    def query(self, sql: str) -> list[Any]:
        engine = create_engine(self.database_url)
        try:
            with engine.connect() as conn:
                return list(conn.execute(text(sql)))
        finally:
            engine.dispose()

    def queued(self) -> dict[str, int]:
        """Each subscription's event count as the database holds it."""
        return {sid: n for sid, n in self.query("SELECT id, events_since_start FROM subscription")}

    def leased_by(self, pid: int) -> set[str]:
        """The subscriptions whose lease the replica with this process id holds (its owner names it)."""
        return {sid for sid, owner in self.query("SELECT id, lease_owner FROM subscription")
                if owner and f":{pid}:" in owner}

    def wait_delivered(self, expected: dict[str, int], within_s: float) -> None:
        deadline = time.monotonic() + within_s
        while time.monotonic() < deadline:
            counts = self.receiver.counts()
            if all(len(counts.get(sid, ())) >= n for sid, n in expected.items()):
                return
            time.sleep(0.25)


def first_arrival_after(receiver: CountingReceiver, sid: str, moment: float) -> float:
    """Seconds from ``moment`` to the subscription's first event to arrive after it."""
    return min(a.at for a in list(receiver.arrivals) if a.subscription == sid and a.at > moment) - moment


@pytest.fixture
def drill(postgres_url: str) -> Iterator[Drill]:
    cli(postgres_url, "db", "upgrade")
    token = cli(postgres_url, "token", "create", "--client", "drill", "--scope", "system/*.cruds")
    receiver = CountingReceiver()
    receiver.up()
    ports = [free_port(), free_port()]
    procs = [start_server(p, env=env(postgres_url)) for p in ports]
    try:
        yield Drill(postgres_url, receiver, ports, procs, {**HEADERS, "Authorization": f"Bearer {token}"})
    finally:
        stop(procs, receiver)


@pytest.mark.timeout(300)
def test_two_replicas_deliver_each_event_once(drill: Drill) -> None:
    drill.subscribe(SUBSCRIPTIONS)
    started = time.monotonic()
    drill.send_results(0, RESULTS)  # both replicas take writes
    expected = drill.queued()
    drill.wait_delivered(expected, within_s=150)
    time.sleep(2.0)  # a duplicate, if any, would arrive now
    counts = drill.receiver.counts()
    total = sum(expected.values())
    duplicates = sum(c - 1 for per in counts.values() for c in per.values() if c > 1)
    lost = sum(n - len(counts.get(sid, ())) for sid, n in expected.items())
    print(f"\ntwo replicas: {total} notifications queued over {len(expected)} subscriptions in "
          f"{time.monotonic() - started:.0f} s; duplicates {duplicates}, lost {lost}")
    assert total >= 5000
    for sid, n in expected.items():
        assert sorted(counts[sid]) == list(range(1, n + 1)), f"subscription {sid}: events missing"
        assert set(counts[sid].values()) == {1}, f"subscription {sid}: events sent more than once"
        first_seen = [a.number for a in drill.receiver.arrivals if a.subscription == sid]
        assert first_seen == sorted(first_seen), f"subscription {sid}: out of order"


@pytest.mark.timeout(300)
def test_a_killed_replicas_pages_continue_within_the_bound_and_resume_promptly_after_an_outage(
    drill: Drill,
) -> None:
    drill.subscribe(SUBSCRIPTIONS)
    drill.send_results(0, CRASH_RESULTS)
    expected = drill.queued()
    # Kill -9 mid-run whichever replica holds a lease at that moment (its leases then lapse instead
    # of being released). Which replica holds what is the replicas' race, so the victim is chosen
    # by looking, not named in advance: one replica may hold every lease for the whole run.
    victim, survivor = drill.procs
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if len(drill.receiver.arrivals) >= sum(expected.values()) // 4:
            holders = [p for p in drill.procs if drill.leased_by(p.pid)]
            if holders:
                victim = holders[0]
                survivor = next(p for p in drill.procs if p is not victim)
                break
        time.sleep(0.05)
    victim.kill()
    killed_at = time.monotonic()
    arrived_before_kill = len(drill.receiver.arrivals)
    victim.wait(timeout=10)
    orphaned = drill.leased_by(victim.pid)
    drill.wait_delivered(expected, within_s=150)
    takeover = {sid: first_arrival_after(drill.receiver, sid, killed_at) for sid in orphaned}

    # The receiver goes away; high-priority Flags queue up on the surviving replica; it comes back.
    drill.receiver.down()
    drill.send_results(CRASH_RESULTS, OUTAGE_RESULTS, ports=[drill.ports[drill.procs.index(survivor)]])
    time.sleep(OUTAGE_S)
    back_at = time.monotonic()
    drill.receiver.up()
    expected = drill.queued()
    drill.wait_delivered(expected, within_s=60)
    time.sleep(1.0)  # a duplicate, if any, would arrive now
    resumed = {sid: first_arrival_after(drill.receiver, sid, back_at) for sid in expected}

    counts = drill.receiver.counts()
    total = sum(expected.values())
    duplicated = {(sid, n) for sid, per in counts.items() for n, c in per.items() if c > 1}
    lost = sum(n - len(counts.get(sid, ())) for sid, n in expected.items())
    print(f"\ncrash drill: {total} notifications over {len(expected)} subscriptions; kill -9 of one replica "
          f"holding {len(orphaned)} subscription(s) once {arrived_before_kill} had arrived: "
          f"taken over after {max(takeover.values(), default=0):.1f} s (per subscription: "
          f"{', '.join(f'{t:.1f}' for t in sorted(takeover.values()))} s); "
          f"receiver outage of {OUTAGE_S:.0f} s: first page after it came back "
          f"{max(resumed.values()):.1f} s at most; duplicates {len(duplicated)}, lost {lost}")
    assert survivor.poll() is None
    assert total >= 5000
    assert orphaned, "the victim held no lease when it was killed: nothing was taken over"
    for sid, n in expected.items():
        assert sorted(counts[sid]) == list(range(1, n + 1)), f"subscription {sid}: events missing"
        first_seen = [a.number for a in drill.receiver.arrivals if a.subscription == sid]
        assert first_seen == sorted(first_seen), f"subscription {sid}: out of order"
    # At-least-once across a crash: the one send the victim had out when it died (its answer never
    # recorded) is sent again by the survivor. Nothing else may arrive twice.
    assert len(duplicated) <= 1 and all(sid in orphaned and max(counts[sid].values()) == 2 for sid, _ in duplicated)
    assert max(takeover.values()) <= BOUND_S
    assert max(resumed.values()) <= BOUND_S


# --- Scale-out proof: two replicas behind a round-robin client against one replica, same feed ------
#
# The feed: FEED_PATIENTS patients, FEED_WAVES sodium results each, five minutes apart, sent wave by
# wave as transactions of conditional updates (PUT by identifier), so a bundle resent after a lost
# answer changes nothing. Values cycle through 116-131 mmol/L: 116-120 are at or below the default
# critical low of 120 mmol/L (RCPath G158 2017), and steps of up to 15 mmol/L in minutes exceed the
# default limit of 10 mmol/L in 24 h (Verbalis JG et al., Am J Med 2013;126:S1-42), so Flags of both
# kinds are raised, closed and raised again. Every result arrives within the hour of its collection,
# so no sentence carries a late-arrival note that would differ with the moment of the run.

FEED_PATIENTS = 80
FEED_WAVES = 5
FEED_PER_BUNDLE = 20
FEED_VALUES = (128, 116, 121, 131, 119, 124, 130, 117)


def feed_bundles(start: float) -> list[tuple[list[str], bytes]]:
    """The feed, in sending order: (identifiers, transaction body) per bundle; the first wave
    collected at ``start`` (epoch seconds), the last 20 minutes later."""
    out = []
    for wave in range(FEED_WAVES):
        for first in range(0, FEED_PATIENTS, FEED_PER_BUNDLE):
            obs = []
            for j in range(first, first + FEED_PER_BUNDLE):
                when = time.strftime("%Y-%m-%dT%H:%M:%S+00:00", time.gmtime(start + wave * 300 + j % 7))
                obs.append(observation(f"sc{j}-{wave}", value=FEED_VALUES[(3 * j + wave) % len(FEED_VALUES)],
                                       patient=f"Patient/sc{j}", effective=when))
            out.append(([o["identifier"][0]["value"] for o in obs],
                        dumps(bundle("transaction", *obs, method="PUT"))))
    return out


@dataclass
class RoundRobin:
    """A client that sends each request to the next replica, and to the next again if one is gone."""

    ports: list[int]
    headers: dict[str, str]
    turn: int = 0
    gone: set[int] = field(default_factory=set)
    unanswered: int = 0  # requests that got no answer and were sent again

    def post(self, body: bytes) -> int:
        for _ in range(2 * len(self.ports)):
            port = self.ports[self.turn % len(self.ports)]
            self.turn += 1
            if port in self.gone:
                continue
            try:
                return httpx.post(f"http://127.0.0.1:{port}/fhir", content=body, headers=self.headers,
                                  timeout=60).status_code
            except httpx.TransportError:
                self.unanswered += 1
                self.gone.add(port)  # no answer: not acknowledged, so it is sent again, elsewhere
        raise AssertionError("no replica answered")


@dataclass
class FeedRun:
    start: float  # the feed's first collection time: every run of the drill sends the same feed
    flags: list[Any]
    events: dict[str, Counter[int]]  # per subscription: event number -> arrivals
    queued: int
    acknowledged: set[str]
    readable: set[str]
    seconds: float
    unanswered: int


def _readable(port: int, headers: dict[str, str]) -> set[str]:
    """Every Observation identifier the replica serves, page by page through the search API."""
    found: set[str] = set()
    url: str | None = f"http://127.0.0.1:{port}/fhir/Observation?_count=500"
    while url:
        page = httpx.get(url, headers=headers, timeout=30).json()
        found |= {e["resource"]["identifier"][0]["value"] for e in page.get("entry", [])}
        url = next((link["url"] for link in page.get("link", []) if link["relation"] == "next"), None)
    return found


def _migrate_and_mint(database_url: str) -> str:
    """The schema and a token, in this process (what `db upgrade` and `token create` do, without the
    start-up of two more interpreters per run)."""
    from datetime import UTC, datetime

    from service.auth.tokens import mint
    from service.db.engine import Database

    db = Database(database_url)
    try:
        db.create_schema()
        with db.session(write=True) as session:
            return mint(session, client="drill", scope="system/*.cruds", now=datetime.now(UTC))
    finally:
        db.dispose()


def run_feed(database_url: str, replicas: int, start: float, *, kill_midway: bool = False) -> FeedRun:
    """The feed through ``replicas`` servers on one database; with ``kill_midway``, the second replica
    gets SIGKILL while the middle bundle is on its way to it."""
    started = time.monotonic()
    extra = {"LYTESTREAM_DELIVERY_TIMEOUT_SECONDS": "2", "LYTESTREAM_DELIVERY_LEASE_SECONDS": "4"}
    headers = {**HEADERS, "Authorization": f"Bearer {_migrate_and_mint(database_url)}"}
    receiver = CountingReceiver()
    receiver.up()
    ports = [free_port() for _ in range(replicas)]
    with ThreadPoolExecutor(max_workers=replicas) as pool:
        procs = list(pool.map(lambda p: start_server(p, env=env(database_url, **extra)), ports))
    try:
        drill = Drill(database_url, receiver, ports, procs, headers)
        drill.subscribe(1)
        client = RoundRobin(ports, headers)
        acknowledged: set[str] = set()
        bundles = feed_bundles(start)
        middle = len(bundles) // 2 | 1  # odd: round robin hands it to the second replica
        for i, (idents, body) in enumerate(bundles):
            if kill_midway and i == middle:
                threading.Timer(0.005, procs[1].kill).start()
            status = client.post(body)
            assert status == 200, f"bundle {i}: {status}"
            acknowledged.update(idents)
        if kill_midway:
            procs[1].wait(timeout=10)
            assert client.gone == {ports[1]}, "the killed replica was never found gone"
        expected = drill.queued()
        drill.wait_delivered(expected, within_s=60)
        time.sleep(1.5)  # a duplicate, if any, would arrive now
        survivor = ports[0]
        return FeedRun(start=start, flags=flag_signatures(database_url), events=receiver.counts(), queued=sum(expected.values()),
                       acknowledged=acknowledged, readable=_readable(survivor, headers),
                       seconds=time.monotonic() - started, unanswered=client.unanswered)
    finally:
        stop(procs, receiver)


@pytest.fixture(scope="module")
def one_replica() -> Iterator[FeedRun]:
    from tests.conftest import _postgres_schema

    # Collected from half an hour ago: the later runs, minutes after this one, still see every result
    # arrive within the hour, so no sentence gains a late note that would differ between runs.
    start = time.time() - 30 * 60
    for url in _postgres_schema():
        yield run_feed(url, replicas=1, start=start)


def _gapless_once(run: FeedRun) -> bool:
    (per,) = run.events.values()
    return sorted(per) == list(range(1, run.queued + 1)) and set(per.values()) == {1}


@pytest.mark.timeout(240)
def test_two_replicas_behind_round_robin_raise_the_flags_of_one_and_notify_each_change_once(
    one_replica: FeedRun, postgres_url: str,
) -> None:
    two = run_feed(postgres_url, replicas=2, start=one_replica.start)
    print(f"\nscale-out: one replica {one_replica.seconds:.1f} s, two {two.seconds:.1f} s; "
          f"{len(two.flags)} Flags, {two.queued} notifications")
    assert {f[1] for f in one_replica.flags} >= {"sodium-critical-low", "sodium-rise-too-fast"}
    assert {f[2] for f in one_replica.flags} >= {"active", "inactive"}
    assert two.flags == one_replica.flags
    assert two.queued == one_replica.queued
    assert _gapless_once(one_replica) and _gapless_once(two)


@pytest.mark.timeout(240)
def test_a_replica_killed_mid_feed_loses_no_acknowledged_result(one_replica: FeedRun, postgres_url: str) -> None:
    run = run_feed(postgres_url, replicas=2, start=one_replica.start, kill_midway=True)
    (per,) = run.events.values()
    print(f"\nkill mid-feed: {len(run.acknowledged)} results acknowledged, {len(run.readable)} readable, "
          f"{run.unanswered} request(s) unanswered and sent again, {run.queued} notifications in {run.seconds:.1f} s")
    assert len(run.acknowledged) == FEED_PATIENTS * FEED_WAVES
    assert run.acknowledged <= run.readable
    # The resent bundle changed nothing: the same Flags as one replica that was never interrupted.
    assert run.flags == one_replica.flags
    assert sorted(per) == list(range(1, run.queued + 1)), "a notification is missing"
    # At-least-once across a crash: only the send the victim had out when it died may come twice.
    assert sum(c - 1 for c in per.values()) <= 1
