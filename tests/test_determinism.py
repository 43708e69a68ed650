"""Invariant 1: the active flags are a function of (stored data, policy, time).

The same stream replayed shuffled, with duplicates and with late results, ends with the same
active Flags (rule, episode, priority, sentence and the results they rest on). Flags raised and
closed on the way may differ with arrival order; the ones left standing may not.
"""

# Sodium 118 or 115 mmol/L stands for a result at or below the critical low of 120 mmol/L
# (RCPath G158 2017; Kost GJ, JAMA 1990;263:704-707), so it raises sodium-critical-low.

from __future__ import annotations

import tempfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import orjson
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.clock import FixedClock
from service.config import Settings
from service.db.reads import FlagQuery, read_version, search_flags
from service.fhir.flag_render import FLAG_DETAIL_URL
from service.ingest import EntryRequest
from service.main import build_context
from tests.factories import insulin, observation

NOW = datetime(2026, 3, 2, 12, 0, tzinfo=UTC)

# Invented stream: a correcting hyponatraemia, a critical potassium later corrected, an insulin
# infusion with two low potassium results, a withdrawn glucose, and a patient who stays normal.
STREAM: list[dict[str, Any]] = [
    observation("a1", value=112, patient="Patient/a", effective="2026-03-01T14:00:00+00:00"),
    observation("a2", value=117, patient="Patient/a", effective="2026-03-01T20:00:00+00:00", status="preliminary"),
    observation("a2", value=118, patient="Patient/a", effective="2026-03-01T20:00:00+00:00"),
    observation("a3", value=124, patient="Patient/a", effective="2026-03-02T08:00:00+00:00"),
    observation("b1", code="2823-3", value=6.8, patient="Patient/b", effective="2026-03-02T07:00:00+00:00"),
    observation("b1", code="2823-3", value=4.8, patient="Patient/b", effective="2026-03-02T07:00:00+00:00",
                status="corrected", issued="2026-03-02T09:00:00+00:00"),
    insulin("c-ins", patient="Patient/c", start="2026-03-02T06:00:00+00:00"),
    observation("c1", code="2823-3", value=3.3, patient="Patient/c", effective="2026-03-02T08:00:00+00:00"),
    observation("c2", code="2823-3", value=3.1, patient="Patient/c", effective="2026-03-02T10:00:00+00:00"),
    observation("d1", code="2345-7", value=30, unit="mg/dL", patient="Patient/d",
                effective="2026-03-02T09:00:00+00:00"),
    observation("d1", code="2345-7", value=30, unit="mg/dL", patient="Patient/d",
                effective="2026-03-02T09:00:00+00:00", status="entered-in-error"),
    observation("e1", value=139, patient="Patient/e", effective="2026-03-02T09:00:00+00:00"),
    # Ties: one instant, two results (the same specimen run twice, a gas and a lab sample stamped alike).
    observation("f1", value=118, patient="Patient/f", effective="2026-03-02T09:00:00+00:00"),
    observation("f2", value=140, patient="Patient/f", effective="2026-03-02T09:00:00+00:00"),
    insulin("g-ins", patient="Patient/g", start="2026-03-02T06:00:00+00:00"),
    observation("g1", code="2823-3", value=3.4, patient="Patient/g", effective="2026-03-02T10:00:00+00:00"),
    observation("g2", code="2823-3", value=4.0, patient="Patient/g", effective="2026-03-02T10:00:00+00:00"),
]


def active_flags(stream: list[dict[str, Any]]) -> set[tuple[Any, ...]]:
    with tempfile.TemporaryDirectory() as tmp:
        ctx = build_context(Settings(data_dir=Path(tmp), scheduler=False), clock=FixedClock(NOW))
        try:
            for resource in stream:
                ctx.ingestor.batch([EntryRequest(root="Bundle.entry[0].resource",
                                                 resource=orjson.loads(orjson.dumps(resource)))], raw=b"{}")
            with ctx.db.session() as session:
                rows, _ = search_flags(session=session, q=FlagQuery(statuses=["active"], count=500))
                out = set()
                for row in rows:
                    flag = orjson.loads(row)
                    evidence = []
                    for e in flag["extension"]:
                        if e["url"] == FLAG_DETAIL_URL:
                            rtype, rid, _, vid = e["valueReference"]["reference"].split("/")
                            cited = orjson.loads(read_version(session=session, resource_type=rtype, rid=rid,
                                                              version=int(vid)) or b"{}")
                            cited.pop("id"), cited.pop("meta")
                            evidence.append(orjson.dumps(cited, option=orjson.OPT_SORT_KEYS))
                    out.add((flag["code"]["coding"][0]["code"], flag["subject"]["reference"], flag["code"]["text"],
                             flag["period"]["start"], tuple(sorted(evidence))))
                return out
        finally:
            ctx.db.dispose()


IN_ORDER = active_flags(STREAM)


def test_the_stream_in_order_raises_the_expected_flags() -> None:
    assert sorted((rule, subject) for rule, subject, *_ in IN_ORDER) == [
        ("hypokalemia-on-insulin", "Patient/c"),
        ("hypokalemia-on-insulin", "Patient/g"),
        ("sodium-critical-low", "Patient/f"),
        ("sodium-rise-too-fast", "Patient/a"),
    ]


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(order=st.permutations(range(len(STREAM))), repeats=st.lists(st.integers(0, len(STREAM) - 1), max_size=4))
def test_shuffled_stream_with_duplicates_gives_the_same_active_flags(order: list[int], repeats: list[int]) -> None:
    stream = [STREAM[i] for i in order] + [STREAM[i] for i in repeats]
    assert active_flags(stream) == IN_ORDER


# Generated ties: sodium results whose collection times are drawn from three instants, so most
# examples hold two or more results of one instant; any arrival order must end the same.
_INSTANTS = ["2026-03-02T02:00:00+00:00", "2026-03-02T02:00:00+00:00", "2026-03-02T08:00:00+00:00",
             "2026-03-02T11:00:00+00:00"]


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    draws=st.lists(st.tuples(st.sampled_from(_INSTANTS), st.integers(110, 165)), min_size=2, max_size=6),
    order=st.randoms(use_true_random=False),
)
def test_results_that_tie_in_time_give_the_same_flags_in_any_arrival_order(
    draws: list[tuple[str, int]], order: Any
) -> None:
    stream = [observation(f"tie{i}", value=value, patient="Patient/t", effective=when)
              for i, (when, value) in enumerate(draws)]
    shuffled = list(stream)
    order.shuffle(shuffled)
    assert active_flags(shuffled) == active_flags(stream)
