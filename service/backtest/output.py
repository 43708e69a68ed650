"""A backtest written out: one CSV per table and a JSON summary (the HTML report is report.py).

Priorities are FHIR flag-priority codes with their display; times are UTC instants; durations in seconds.
Patients are named by the store's internal patient key; with ``identifiers`` (the CLI's
``--with-identifiers``, recorded as a disclosure) the names the feeds sent are added beside it.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

import orjson

from service.backtest.compare import Comparison, PolicyFigures, RuleRow
from service.backtest.engine import SimFlag
from service.fhir.render import CAUTION, fhir_instant
from service.vocabulary import PRIORITY_DISPLAY, priority_code

__all__ = ["ASSUMPTIONS", "by_rule_csv", "differences_csv", "flags_csv", "patients_named", "per_day_csv",
           "summary_json", "write_all"]

ASSUMPTIONS = (
    "Escalations are counted as if no Flag was ever acknowledged.",
    "Each result is replayed as it now stands (its current stored version), arriving when that version was "
    "stored; earlier versions of a corrected result are not replayed.",
    "Time-driven rechecks run at every arrival, every tick while insulin is recorded, and when a result "
    "leaves the look-back window while a Flag is open.",
    "Median and p90 are nearest-rank: the value at rank ceil(p/100 x n) of the n sorted values.",
)

BY_RULE_COLUMNS = ("policy", "rule", "raised_priority", "raised_priority_display", "flags_raised",
                   "patients_affected", "flags_per_1000_results", "flags_per_patient_day",
                   "median_seconds_result_to_flag_nearest_rank", "p90_seconds_result_to_flag_nearest_rank",
                   "escalations_if_never_acknowledged")
FLAG_COLUMNS = ("policy", "patient_key", "rule", "raised_priority", "raised_priority_display", "raised_at",
                "seconds_result_to_flag", "latest_priority", "latest_priority_display", "closed_at",
                "closed_how", "escalations_if_never_acknowledged", "sentence")
DIFFERENCE_COLUMNS = ("change", "patient_key", "rule", "raised_priority", "raised_priority_display",
                      "raised_at", "sentence")


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return f"{value:.4g}" if abs(value) < 1e6 else f"{value:.0f}"
    return str(value)


def _csv(columns: tuple[str, ...], rows: list[list[object]]) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    writer.writerows([[_cell(v) for v in row] for row in rows])
    return buf.getvalue()


def _rule_cells(name: str, r: RuleRow) -> list[object]:
    display = PRIORITY_DISPLAY.get(r.priority, "all priorities")
    return [name, r.rule, r.priority, display, r.flags, r.patients, r.per_1000_results, r.per_patient_day,
            r.median_seconds, r.p90_seconds, r.escalations]


def by_rule_csv(c: Comparison) -> str:
    rows = [_rule_cells(p.name, r) for p in (c.baseline, c.candidate) for r in (*p.rows, p.total)]
    return _csv(BY_RULE_COLUMNS, rows)


def _flag_cells(name: str, f: SimFlag, start: Any, end: Any) -> list[object]:
    raised, latest = priority_code(f.raised_priority), priority_code(f.priority)
    return [name, f.patient, f.rule, raised, PRIORITY_DISPLAY[raised], fhir_instant(f.raised_at),
            f.seconds_result_to_flag, latest, PRIORITY_DISPLAY[latest],
            fhir_instant(f.closed_at) if f.closed_at else None, f.closed_how or "open at the end",
            f.escalations, f.sentence]


def _named(columns: tuple[str, ...], rows: list[list[object]], patients: list[str],
           identifiers: dict[str, list[str]] | None) -> str:
    if identifiers is None:
        return _csv(columns, rows)
    return _csv((*columns, "patient_identifiers"),
                [[*row, "; ".join(identifiers.get(key, []))] for row, key in zip(rows, patients, strict=True)])


def flags_csv(c: Comparison, identifiers: dict[str, list[str]] | None = None) -> str:
    flags = [(p.name, f) for p in (c.baseline, c.candidate) for f in p.flags]
    return _named(FLAG_COLUMNS, [_flag_cells(name, f, c.start, c.end) for name, f in flags],
                  [f.patient for _, f in flags], identifiers)


def differences_csv(c: Comparison, identifiers: dict[str, list[str]] | None = None) -> str:
    rows: list[list[object]] = []
    for d in c.differences:
        code = priority_code(d.flag.raised_priority)
        rows.append([d.change, d.flag.patient, d.flag.rule, code, PRIORITY_DISPLAY[code],
                     fhir_instant(d.flag.raised_at), d.flag.sentence])
    return _named(DIFFERENCE_COLUMNS, rows, [d.flag.patient for d in c.differences], identifiers)


def patients_named(c: Comparison) -> list[str]:
    """The patient keys the Flag tables name."""
    return sorted({f.patient for p in (c.baseline, c.candidate) for f in p.flags}
                  | {d.flag.patient for d in c.differences})


def per_day_csv(c: Comparison) -> str:
    days = sorted({*c.baseline.per_day, *c.candidate.per_day})
    return _csv(("date_utc", "baseline_flags_raised", "candidate_flags_raised"),
                [[d.isoformat(), c.baseline.per_day.get(d, 0), c.candidate.per_day.get(d, 0)] for d in days])


def _policy_json(p: PolicyFigures) -> dict[str, Any]:
    t = p.total
    return {"policy_hash": p.policy_hash, "flags_raised": t.flags, "patients_affected": t.patients,
            "flags_per_1000_results": t.per_1000_results, "flags_per_patient_day": t.per_patient_day,
            "median_seconds_result_to_flag": t.median_seconds, "p90_seconds_result_to_flag": t.p90_seconds,
            "escalations_if_never_acknowledged": t.escalations,
            "by_rule": [{"rule": r.rule, "raised_priority": {"code": r.priority,
                                                             "display": PRIORITY_DISPLAY[r.priority]},
                         "flags_raised": r.flags, "patients_affected": r.patients} for r in p.rows]}


def summary_json(c: Comparison) -> dict[str, Any]:
    return {
        "start": fhir_instant(c.start), "end": fhir_instant(c.end),
        "range": "[start, end): start included, end excluded",
        "results_stored": c.results_stored, "patient_days": c.patient_days,
        "evaluations": c.evaluations,
        "baseline": _policy_json(c.baseline), "candidate": _policy_json(c.candidate),
        "flags_gained": sum(1 for d in c.differences if d.change == "gained"),
        "flags_lost": sum(1 for d in c.differences if d.change == "lost"),
        "assumptions": list(ASSUMPTIONS),
        "caution": CAUTION,
    }


def write_all(c: Comparison, out: Path, identifiers: dict[str, list[str]] | None = None) -> list[Path]:
    """Every table and the JSON summary into directory ``out``; returns the files written."""
    out.mkdir(parents=True, exist_ok=True)
    files = {"by_rule.csv": by_rule_csv(c), "flags.csv": flags_csv(c, identifiers),
             "gained_lost.csv": differences_csv(c, identifiers),
             "per_day.csv": per_day_csv(c),
             "summary.json": orjson.dumps(summary_json(c), option=orjson.OPT_INDENT_2).decode() + "\n"}
    written = []
    for name, text in files.items():
        path = out / name
        path.write_text(text, encoding="utf-8")
        written.append(path)
    return written
