"""The engine on hand-made histories: escalation rounds at the edges of the range, versions by arrival.

Potassium 6.6 mmol/L is at or above the critical high of 6.5 (RCPath G158 2017): a high-priority (PH)
Flag, escalated every 15 min while unacknowledged (default.toml [escalation.after_minutes], common
practice, no source).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from service.backtest.engine import History, simulate
from service.domain.values import Analyte, LabResult, ResultStatus, Specimen
from service.policy import load_policy

T0 = datetime(2026, 5, 1, 10, 0, tzinfo=UTC)
LOOKBACK = timedelta(hours=72)


def potassium(value: float, *, version: int = 1, arrived: datetime = T0, status: str = "final") -> LabResult:
    return LabResult(observation_id="k1", version=version, patient="p", analyte=Analyte.POTASSIUM,
                     specimen=Specimen.SERUM_PLASMA, loinc="2823-3", status=ResultStatus(status),
                     effective=T0 - timedelta(minutes=30), value=value, key="lab|k1", arrived=arrived)


def test_rounds_fall_every_interval_and_the_end_itself_is_excluded() -> None:
    run = simulate(History("p", (potassium(6.6),)), load_policy(), lookback=LOOKBACK, end=T0 + timedelta(hours=1))
    (flag,) = run.flags
    assert flag.escalations == 3  # 10:15, 10:30, 10:45; 11:00 is the end


def test_counting_from_a_round_includes_that_round() -> None:
    run = simulate(History("p", (potassium(6.6),)), load_policy(), lookback=LOOKBACK, end=T0 + timedelta(hours=1),
                   count_from=T0 + timedelta(minutes=30))
    assert run.flags[0].escalations == 2  # 10:30 and 10:45


def test_a_correction_closes_the_flag_when_it_arrives_not_before() -> None:
    history = History("p", (potassium(6.6), potassium(4.2, version=2, arrived=T0 + timedelta(minutes=20))))
    run = simulate(history, load_policy(), lookback=LOOKBACK, end=T0 + timedelta(hours=1))
    (flag,) = run.flags
    assert (flag.raised_at, flag.closed_at, flag.closed_how) == (T0, T0 + timedelta(minutes=20), "closed")
    assert flag.escalations == 1  # 10:15 only: closed at 10:20


def test_a_result_entered_in_error_withdraws_its_flag() -> None:
    history = History("p", (potassium(6.6), potassium(6.6, version=2, arrived=T0 + timedelta(minutes=5),
                                                     status="entered-in-error")))
    (flag,) = simulate(history, load_policy(), lookback=LOOKBACK, end=T0 + timedelta(hours=1)).flags
    assert flag.closed_how == "withdrawn"


def test_a_version_arriving_after_the_end_is_not_seen() -> None:
    history = History("p", (potassium(6.6, arrived=T0 + timedelta(hours=2)),))
    assert simulate(history, load_policy(), lookback=LOOKBACK, end=T0 + timedelta(hours=1)).flags == ()
