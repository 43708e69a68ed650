"""The backtest as one self-contained HTML file: the tables, and two plots drawn with matplotlib and
embedded as PNG data, so the file opens offline and can be mailed to a committee as it is."""

from __future__ import annotations

import base64
import io
from datetime import date
from html import escape
from pathlib import Path

from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from service.backtest.compare import Comparison, PolicyFigures, RuleRow
from service.backtest.output import ASSUMPTIONS
from service.fhir.render import CAUTION, fhir_instant
from service.vocabulary import PRIORITY_DISPLAY, priority_code

__all__ = ["burden_plot", "render_report", "rule_plot", "write_report"]

_LISTED = 500  # gained/lost rows shown in the HTML; the CSV has them all
_COLOURS = {"baseline": "#4c72b0", "candidate": "#dd8452"}


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    return buf.getvalue()


def burden_plot(c: Comparison) -> bytes:
    """Flags raised per UTC day under each policy (PNG)."""
    days = sorted({*c.baseline.per_day, *c.candidate.per_day}) or [c.start.date()]
    fig = Figure(figsize=(8, 3.2))
    ax = fig.subplots()
    x = list(range(len(days)))
    for offset, p in ((-0.2, c.baseline), (0.2, c.candidate)):
        ax.bar([i + offset for i in x], [p.per_day.get(d, 0) for d in days], width=0.4, label=p.name,
               color=_COLOURS[p.name])
    step = max(1, len(days) // 12)  # at most about twelve date labels
    ax.set_xticks(x[::step], [d.isoformat() for d in days[::step]])
    ax.set_title("Alert burden: Flags raised per day (UTC)")
    ax.set_ylabel("Flags raised")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.legend()
    ax.grid(axis="y", alpha=0.3)
    fig.autofmt_xdate()
    return _png(fig)


def rule_plot(c: Comparison) -> bytes:
    """Flags raised per rule under each policy, side by side (PNG)."""
    def per_rule(p: PolicyFigures) -> dict[str, int]:
        out: dict[str, int] = {}
        for r in p.rows:
            out[r.rule] = out.get(r.rule, 0) + r.flags
        return out

    base, cand = per_rule(c.baseline), per_rule(c.candidate)
    rules = sorted({*base, *cand}) or ["(none)"]
    fig = Figure(figsize=(8, max(2.5, 0.42 * len(rules) + 1)))
    ax = fig.subplots()
    y = list(range(len(rules)))
    ax.barh([i - 0.2 for i in y], [base.get(r, 0) for r in rules], height=0.4, label="baseline",
            color=_COLOURS["baseline"])
    ax.barh([i + 0.2 for i in y], [cand.get(r, 0) for r in rules], height=0.4, label="candidate",
            color=_COLOURS["candidate"])
    ax.set_yticks(y, rules)
    ax.invert_yaxis()
    ax.set_xlabel("Flags raised")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_title("Flags raised per rule")
    ax.legend()
    ax.grid(axis="x", alpha=0.3)
    return _png(fig)


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{escape(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode()}">'


def _num(v: float | None, digits: int = 2) -> str:
    return "" if v is None else f"{v:.{digits}f}"


def _minutes(seconds: float | None) -> str:
    return "" if seconds is None else f"{seconds / 60:.1f}"


def _rule_rows(p: PolicyFigures) -> str:
    def row(r: RuleRow) -> str:
        display = PRIORITY_DISPLAY.get(r.priority, "all")
        return (f"<tr><td>{escape(p.name)}</td><td>{escape(r.rule)}</td><td>{escape(r.priority)} "
                f"({escape(display)})</td><td>{r.flags}</td><td>{r.patients}</td><td>{_num(r.per_1000_results)}</td>"
                f"<td>{_num(r.per_patient_day, 3)}</td><td>{_minutes(r.median_seconds)}</td>"
                f"<td>{_minutes(r.p90_seconds)}</td><td>{r.escalations}</td></tr>")
    return "".join(row(r) for r in (*p.rows, p.total))


def render_report(c: Comparison) -> str:
    """The whole report as HTML text."""
    gained = [d for d in c.differences if d.change == "gained"]
    lost = [d for d in c.differences if d.change == "lost"]
    diff_rows = "".join(
        f"<tr><td>{d.change}</td><td>{escape(d.flag.patient)}</td><td>{escape(d.flag.rule)}</td>"
        f"<td>{priority_code(d.flag.raised_priority)}</td><td>{fhir_instant(d.flag.raised_at)}</td>"
        f"<td>{escape(d.flag.sentence)}</td></tr>" for d in c.differences[:_LISTED])
    more = (f"<p>{len(c.differences) - _LISTED} more in gained_lost.csv.</p>"
            if len(c.differences) > _LISTED else "")
    b, k = c.baseline.total, c.candidate.total
    assumptions = "".join(f"<li>{escape(a)}</li>" for a in ASSUMPTIONS)
    days: list[date] = sorted({*c.baseline.per_day, *c.candidate.per_day})
    span = f"{days[0].isoformat()} to {days[-1].isoformat()}" if days else "no Flags"
    return f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>lytestream policy backtest</title>
<style>
body {{ font-family: system-ui, sans-serif; margin: 2em; max-width: 70em; color: #222; }}
table {{ border-collapse: collapse; margin: 1em 0; font-size: 0.9em; }}
th, td {{ border: 1px solid #ccc; padding: 0.25em 0.5em; text-align: left; vertical-align: top; }}
th {{ background: #f3f3f3; }} .caution {{ border-left: 4px solid #c33; padding: 0.5em 1em; background: #fff6f6; }}
img {{ max-width: 100%; }}
</style></head><body>
<h1>Policy backtest</h1>
<p class="caution">{escape(CAUTION)}</p>
<p>Range [{fhir_instant(c.start)}, {fhir_instant(c.end)}): {c.results_stored} results stored,
{c.patient_days} patient-days, {c.evaluations} rule evaluations; Flags raised {span}.
Baseline policy hash {escape(c.baseline.policy_hash)}, candidate {escape(c.candidate.policy_hash)}.</p>
<table><tr><th></th><th>baseline</th><th>candidate</th></tr>
<tr><td>Flags raised</td><td>{b.flags}</td><td>{k.flags}</td></tr>
<tr><td>patients affected</td><td>{b.patients}</td><td>{k.patients}</td></tr>
<tr><td>Flags per 1000 results</td><td>{_num(b.per_1000_results)}</td><td>{_num(k.per_1000_results)}</td></tr>
<tr><td>Flags per patient-day</td><td>{_num(b.per_patient_day, 3)}</td><td>{_num(k.per_patient_day, 3)}</td></tr>
<tr><td>result → Flag, median / p90 (min, nearest rank)</td><td>{_minutes(b.median_seconds)} /
{_minutes(b.p90_seconds)}</td><td>{_minutes(k.median_seconds)} / {_minutes(k.p90_seconds)}</td></tr>
<tr><td>escalations if never acknowledged</td><td>{b.escalations}</td><td>{k.escalations}</td></tr>
<tr><td>Flags gained / lost by the candidate</td><td colspan="2">{len(gained)} gained, {len(lost)} lost</td></tr>
</table>
{_img(burden_plot(c), "Flags raised per day under each policy")}
{_img(rule_plot(c), "Flags raised per rule under each policy")}
<h2>Per rule and raised priority</h2>
<table><tr><th>policy</th><th>rule</th><th>raised priority</th><th>Flags</th><th>patients</th>
<th>per 1000 results</th><th>per patient-day</th><th>median min result → Flag</th><th>p90 min</th>
<th>escalations if never acknowledged</th></tr>
{_rule_rows(c.baseline)}{_rule_rows(c.candidate)}</table>
<h2>Flags gained and lost</h2>
<table><tr><th>change</th><th>patient (internal key)</th><th>rule</th><th>raised priority</th><th>raised at</th>
<th>sentence</th></tr>{diff_rows}</table>{more}
<h2>How it was computed</h2><ul>{assumptions}</ul>
</body></html>
"""


def write_report(c: Comparison, out: Path) -> Path:
    path = out / "report.html"
    path.write_text(render_report(c), encoding="utf-8")
    return path
