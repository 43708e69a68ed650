"""No watched result is accepted and ignored, whatever its collection time.

Collection times are generated from a year and more in the past to days in the future. Each result is
its own patient's, so what became of it can be read off alone: beyond the future tolerance it is
refused with the skew named; otherwise it is stored, and then it is either evaluated (a critical value
raises a Flag citing it, in the current window or in its own) or the answer says it was stored but not
evaluated, and why.
"""

# Potassium 2.0 mmol/L is at or below the critical low of 2.5 and sodium 115 at or below 120
# (site-policy defaults, RCPath G158 2017; Kost 1990), so each raises a critical-low Flag wherever
# it is judged.

from __future__ import annotations

import tempfile
from datetime import UTC, datetime, timedelta
from pathlib import Path

import orjson
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import select

from service.clock import FixedClock
from service.config import Settings
from service.db.tables import FlagRecord
from service.ingest import EntryRequest
from service.main import build_context
from service.policy import load_policy
from tests.factories import observation

NOW = datetime(2026, 3, 2, 12, 0, tzinfo=UTC)
LOOKBACK = timedelta(hours=72)
TOLERANCE = timedelta(minutes=load_policy().timing.future_tolerance_minutes)

KINDS = {
    "critical-potassium": {"code": "2823-3", "value": 2.0},
    "critical-sodium": {"code": "2951-2", "value": 115},
    "no-value": {"code": "2951-2", "value": None},
    "registered": {"code": "2823-3", "value": None, "status": "registered"},
    "urine": {"code": "2955-3", "value": 40},
}
CRITICAL = {"critical-potassium", "critical-sodium"}

minutes = st.one_of(
    st.integers(min_value=-400 * 24 * 60, max_value=3 * 24 * 60),  # ancient to future
    st.sampled_from([-72 * 60 - 1, -72 * 60, -72 * 60 + 1, -61, -59, 0, 4, 5, 6]),  # the edges
)
results = st.lists(st.tuples(minutes, st.sampled_from(sorted(KINDS))), min_size=1, max_size=6)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(results)
def test_every_stored_watched_result_is_evaluated_or_reported_as_not_evaluated(
    batch: list[tuple[int, str]],
) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        ctx = build_context(Settings(data_dir=Path(tmp), scheduler=False), clock=FixedClock(NOW))
        try:
            entries = []
            for i, (offset, kind) in enumerate(batch):
                effective = (NOW + timedelta(minutes=offset)).isoformat()
                resource = observation(f"r{i}", patient=f"Patient/p{i}", effective=effective, **KINDS[kind])
                entries.append(EntryRequest(root=f"Bundle.entry[{i}].resource",
                                            resource=orjson.loads(orjson.dumps(resource))))
            answers = ctx.ingestor.batch(entries, raw=b"{}")
            with ctx.db.session() as session:
                evidence = " ".join(session.execute(select(FlagRecord.evidence)).scalars())  # type: ignore[call-overload]
        finally:
            ctx.db.dispose()

    for (offset, kind), answer in zip(batch, answers, strict=True):
        messages = [i.message for i in answer.issues]
        if timedelta(minutes=offset) > TOLERANCE:
            assert answer.status == 422, messages
            assert any("after the server's current time" in m for m in messages), messages
            continue
        assert answer.status == 201 and answer.location is not None, messages
        observation_id = answer.location.split("/")[1]
        flagged = f"Observation/{observation_id}/" in evidence
        reported = [m for m in messages if m.startswith("stored but not evaluated")]
        if kind in CRITICAL:
            assert flagged and not reported, (offset, kind, messages)
        else:
            assert reported and not flagged, (offset, kind, messages)
        if timedelta(minutes=offset) <= -LOOKBACK and kind in CRITICAL:
            assert any("look-back window" in m for m in messages), messages
