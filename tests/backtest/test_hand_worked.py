"""The backtest on a small invented feed whose Flags under each policy are worked out by hand.

Invented feed, range [2026-04-01, 2026-04-03), every result issued 30 min after collection (it arrives
then: service.demo's arrival rule). Baseline = the built-in policy; candidate = the built-in policy with
four thresholds changed, each to a value with a published source:

* sodium rise limit 10 → 8 mmol/L per 24 h (baseline: Spasovski G et al, Eur J Endocrinol 2014;170:G1-G47;
  candidate: Verbalis JG et al, Am J Med 2013;126(10 Suppl 1):S1-S42, 8 in any 24 h; both as cited in
  service/policy/default.toml [from memory])
* potassium critical high 6.5 → 6.2 mmol/L (baseline RCPath G158 2017; candidate Campbell CA et al,
  Clin Chem Lab Med 2018;57:89-94)
* glucose critical high 25.0 → 26.9 mmol/L (baseline RCPath G158 2017; candidate Kost GJ, JAMA
  1990;263:704-707, survey mean high)

Patients and what each policy raises (worked by hand):

=======  ==============================================  ====================  ======================
patient  results (collected)                             baseline              candidate
=======  ==============================================  ====================  ======================
bt-a     Na 118 (04-01 01:00), Na 127 (04-02 00:00)      Na critical low       Na critical low,
         rise 9 in 23 h; 9 ≤ 10, 9 > 8; 118 ≤ 120        (RCPath "<=120")      Na rise too fast
bt-b     K 6.3 (04-01 10:00)                             nothing (6.3 < 6.5)   K critical high (≥6.2)
bt-c     K 6.6 (04-01 11:00)                             K critical high       K critical high
bt-d     glucose 26.0 (04-01 12:00)                      glucose critical      nothing (26.0 < 26.9)
                                                         high (≥25)
=======  ==============================================  ====================  ======================

So the candidate gains two Flags (bt-a sodium rise, bt-b potassium high) and loses one (bt-d glucose high).
Decision support only: these thresholds are site policy.
"""

from __future__ import annotations

import csv
from datetime import UTC, datetime, timedelta
from pathlib import Path

import orjson
import pytest

from service.backtest.compare import Comparison
from service.backtest.feed import store_feed
from service.backtest.output import write_all
from service.backtest.run import Backtest, run_backtest
from service.policy import Policy, load_policy
from tests.factories import observation

START = datetime(2026, 4, 1, tzinfo=UTC)
END = datetime(2026, 4, 3, tzinfo=UTC)
SODIUM, POTASSIUM, GLUCOSE = "2951-2", "2823-3", "14749-6"  # LOINC serum/plasma sodium, potassium, glucose

_DEFAULT = Path(__file__).resolve().parents[2] / "service" / "policy" / "default.toml"
_CHANGES = (
    ("limit_24h = 10.0            #", "limit_24h = 8.0            #"),
    ("limit_24h_after_first_day = 10.0", "limit_24h_after_first_day = 8.0"),
    ('high = 6.5  # RCPath G158 2017 (">=6.5"); alternative 6.2',
     'high = 6.2  # RCPath G158 2017 (">=6.5"); alternative 6.2'),
    ('high = 25.0 # RCPath G158 2017 (adults, ">=25")', 'high = 26.9 # RCPath G158 2017 (adults, ">=25")'),
)


def _candidate(tmp: Path) -> Policy:
    text = _DEFAULT.read_text("utf-8")
    for old, new in _CHANGES:
        assert text.count(old) == 1, old  # the edit lands on exactly the threshold meant
        text = text.replace(old, new)
    path = tmp / "candidate.toml"
    path.write_text(text, "utf-8")
    return load_policy(path)


def _result(ident: str, patient: str, code: str, value: float, collected: str) -> dict[str, object]:
    at = datetime.fromisoformat(collected)
    return observation(ident=ident, code=code, value=value, patient=f"Patient/{patient}",
                       effective=at.isoformat(), issued=(at + timedelta(minutes=30)).isoformat())


FEED = [
    _result("a1", "bt-a", SODIUM, 118, "2026-04-01T01:00:00+00:00"),
    _result("b1", "bt-b", POTASSIUM, 6.3, "2026-04-01T10:00:00+00:00"),
    _result("c1", "bt-c", POTASSIUM, 6.6, "2026-04-01T11:00:00+00:00"),
    _result("d1", "bt-d", GLUCOSE, 26.0, "2026-04-01T12:00:00+00:00"),
    _result("a2", "bt-a", SODIUM, 127, "2026-04-02T00:00:00+00:00"),
]


@pytest.fixture(scope="module")
def comparison(tmp_path_factory: pytest.TempPathFactory) -> Comparison:
    tmp = tmp_path_factory.mktemp("backtest")
    feed = tmp / "feed.ndjson"
    feed.write_bytes(b"\n".join(orjson.dumps(r) for r in FEED) + b"\n")
    url, read, stored = store_feed(feed, tmp / "store")
    assert (read, stored) == (5, 5)
    job = Backtest(database_url=url, baseline=load_policy(), candidate=_candidate(tmp), start=START, end=END,
                   lookback=timedelta(hours=72))
    return run_backtest(job)


def test_baseline_raises_the_flags_worked_by_hand(comparison: Comparison) -> None:
    assert sorted(f.rule for f in comparison.baseline.flags) == sorted(
        ["sodium-critical-low", "potassium-critical-high", "glucose-critical-high"])


def test_candidate_raises_the_flags_worked_by_hand(comparison: Comparison) -> None:
    assert sorted(f.rule for f in comparison.candidate.flags) == sorted(
        ["sodium-critical-low", "sodium-rise-too-fast", "potassium-critical-high", "potassium-critical-high"])


def test_gained_and_lost_are_the_differences_worked_by_hand(comparison: Comparison) -> None:
    got = [(d.change, d.flag.rule, d.flag.raised_at) for d in comparison.differences]
    assert got == [
        ("gained", "potassium-critical-high", datetime(2026, 4, 1, 10, 30, tzinfo=UTC)),  # bt-b, K 6.3 ≥ 6.2
        ("lost", "glucose-critical-high", datetime(2026, 4, 1, 12, 30, tzinfo=UTC)),  # bt-d, 26.0 < 26.9
        ("gained", "sodium-rise-too-fast", datetime(2026, 4, 2, 0, 30, tzinfo=UTC)),  # bt-a, 9 > 8
    ]


def test_each_difference_carries_its_sentence(comparison: Comparison) -> None:
    by_rule = {d.flag.rule: d.flag.sentence for d in comparison.differences}
    assert "6.3" in by_rule["potassium-critical-high"] and "6.2" in by_rule["potassium-critical-high"]
    assert "26" in by_rule["glucose-critical-high"]
    assert "9 mmol/L" in by_rule["sodium-rise-too-fast"] and "8 mmol/L" in by_rule["sodium-rise-too-fast"]


def test_burden_counts_results_and_patient_days_in_the_range(comparison: Comparison) -> None:
    # 5 results; patient-days: bt-a on 04-01 and 04-02, bt-b, bt-c, bt-d on 04-01 → 5.
    assert (comparison.results_stored, comparison.patient_days) == (5, 5)
    assert comparison.baseline.total.per_1000_results == pytest.approx(3 * 1000 / 5)
    assert comparison.candidate.total.per_patient_day == pytest.approx(4 / 5)


def test_escalations_assume_no_acknowledgement(comparison: Comparison) -> None:
    # bt-b's candidate Flag (PH, escalated every 15 min: default.toml [escalation.after_minutes]) is raised
    # 04-01 10:30 and stays open to the end 04-03 00:00: 37.5 h = 150 intervals, the 150th falling on the
    # end itself (excluded) → 149 rounds.
    rows = {(r.rule, r.priority): r for r in comparison.candidate.rows}
    bt_b = [f for f in comparison.candidate.flags if f.rule == "potassium-critical-high"
            and f.raised_at == datetime(2026, 4, 1, 10, 30, tzinfo=UTC)]
    assert len(bt_b) == 1 and bt_b[0].escalations == 149
    assert rows[("potassium-critical-high", "PH")].flags == 2


def test_unchanged_flags_are_neither_gained_nor_lost(comparison: Comparison) -> None:
    listed = {(d.flag.patient, d.flag.rule) for d in comparison.differences}
    both = {(f.patient, f.rule) for f in comparison.baseline.flags} & {
        (f.patient, f.rule) for f in comparison.candidate.flags}
    assert len(both) == 2 and not both & listed  # bt-a sodium low, bt-c potassium high


def test_tables_are_written_with_priority_codes_and_display(comparison: Comparison, tmp_path: Path) -> None:
    write_all(comparison, tmp_path)
    rows = list(csv.DictReader((tmp_path / "gained_lost.csv").read_text("utf-8").splitlines()))
    assert [(r["change"], r["raised_priority"], r["raised_priority_display"]) for r in rows] == [
        ("gained", "PH", "High priority"), ("lost", "PH", "High priority"), ("gained", "PH", "High priority")]
    summary = orjson.loads((tmp_path / "summary.json").read_bytes())
    assert (summary["flags_gained"], summary["flags_lost"]) == (2, 1)
    assert "no Flag was ever acknowledged" in " ".join(summary["assumptions"])


def test_the_html_report_is_one_offline_file_with_both_plots(comparison: Comparison, tmp_path: Path) -> None:
    from service.backtest.report import write_report

    html = write_report(comparison, tmp_path).read_text("utf-8")
    assert html.count('src="data:image/png;base64,') == 2  # embedded: no file or network fetch
    assert "http://" not in html.replace("http://hl7.org", "") and "https://" not in html
    assert "Decision support" in html or "decision support" in html
    assert "2 gained, 1 lost" in html
