"""Sodium corrected too fast: rising in hyponatraemia, falling in hypernatraemia or in a
hyperglycaemic crisis.

What is judged. Each sodium point is the measured sodium, or the glucose-corrected sodium when a
laboratory glucose drawn within the pairing window is at or above ``corrected_sodium_from_glucose``
(250 mg/dL): in hyperglycaemia measured sodium rises as glucose falls while tonicity does not, and
treating that rise as overcorrection would invite a response that lowers tonicity. Sentences say
which sodium was judged.

Like with like. Whole-blood (direct ISE) and laboratory (indirect ISE) sodium differ by a few
mmol/L (Story DA et al, Anesth Analg 2007;104:893-897). A change measured between the two kinds
counts only by what exceeds ``method_bias_allowance``. Every change is measured from a point drawn
strictly earlier than the latest one: two results of the same instant give no rate at all. Suspect
results (``service.domain.artefacts``) never reach these rules.

Rise (hypotonic hyponatraemia), flagged when the reference point (the nadir) is strictly below
  ``applies_below`` (130) and no measured serum osmolality paired with the nadir is at or above
  ``stand_down_measured_osmolality_at_least`` (275, not hypotonic): a rise from the 24 h nadir
  strictly above ``limit_24h`` (10; ``limit_24h_after_first_day`` once the latest point is more
  than 24 h after the 48 h nadir; ``limit_24h_high_risk`` (8) when the data show high risk: a 48 h
  nadir at or below 105 or a potassium strictly below 3.5 in the 48 h window), or a rise from the
  48 h nadir strictly above ``limit_48h`` (18).
Projected rise, a warning while no limit is crossed: at least ``projection_min_results_after_nadir``
  results of the same method after the 24 h nadir, a rise strictly above ``projection_min_change``
  (the sodium reference change value) over at least ``projection_min_hours``, whose pace
  extrapolated to 24 h is strictly above the 24 h limit.
Fall (hypernatraemia), flagged when the 24 h peak is strictly above ``applies_above`` (145): a fall
  strictly above ``limit_24h`` (10), or strictly faster than ``max_rate_per_hour`` (0.5) measured
  over at least ``rate_min_hours`` (4).
Fall in a hyperglycaemic crisis: the data show a crisis (``service.domain.crisis``) when the 24 h
  peak was drawn, and the fall from it is strictly above ``crisis_fall.limit_24h``. A fall that
  began in a crisis is judged by this limit only, never by the hypernatraemia one.

Decision support only: these describe the data against site policy; they do not prescribe.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import timedelta

from service.domain.crisis import crisis_at
from service.domain.derived import judged_corrected_sodium, pair_nearest
from service.domain.findings import Finding, Priority, Rule
from service.domain.rules.series import LAB_BLOOD, Verdict, below, exact, fmt, hours, trailing_run_start
from service.domain.values import Analyte, InsulinExposure, LabResult, Method, Specimen
from service.policy.model import Policy

__all__ = ["evaluate_sodium_rate"]

_DAY = timedelta(hours=24)
_TWO_DAYS = timedelta(hours=48)


@dataclass(frozen=True, slots=True)
class _Point:
    result: LabResult
    value: float  # the sodium judged: corrected for glucose when glucose was high, else measured
    glucose: LabResult | None  # the glucose it was corrected with
    method: Method
    hypertonic: bool  # a paired measured osmolality says this sodium is not hypotonic

    @property
    def corrected(self) -> bool:
        return self.glucose is not None

    @property
    def refs(self) -> tuple[str, ...]:
        return (self.result.reference,) + ((self.glucose.reference,) if self.glucose else ())


@dataclass(frozen=True, slots=True)
class _Assessment:
    rule: Rule
    priority: Priority
    evidence: tuple[str, ...]
    numbers: dict[str, float]
    sentence: str


@dataclass(frozen=True, slots=True)
class _Change:
    """The change of the latest point from a strictly earlier reference point."""

    ref: _Point
    current: _Point
    allowance: float  # the method bias allowance when the two are of different methods, else 0

    @property
    def amount(self) -> float:
        return self.current.value - self.ref.value

    @property
    def hours(self) -> float:
        return hours(self.ref.result.effective, self.current.result.effective)

    def label(self) -> str:
        return "Glucose-corrected sodium" if self.ref.corrected or self.current.corrected else "Sodium"

    def details(self) -> str:
        parts = []
        if self.ref.corrected or self.current.corrected:
            parts.append(
                f"measured {fmt(self.ref.result.value or 0.0)} to {fmt(self.current.result.value or 0.0)}"
            )
        if self.allowance:
            parts.append(f"whole-blood and laboratory sodium compared with a {fmt(self.allowance)} mmol/L "
                         "method allowance")
        return f" ({'; '.join(parts)})" if parts else ""

    def numbers(self) -> dict[str, float]:
        return {
            "hours": self.hours,
            "corrected": 1.0 if self.ref.corrected or self.current.corrected else 0.0,
            "measured_start": self.ref.result.value or 0.0,
            "measured_now": self.current.result.value or 0.0,
            "method_allowance": self.allowance,
        }


def evaluate_sodium_rate(
    results: Sequence[LabResult],
    exposures: Sequence[InsulinExposure],
    policy: Policy,
    patient: str,
) -> list[Finding]:
    """Rise, projected-rise and fall findings for one patient's time-ordered, urine-free results."""
    points = _points(results, policy)
    potassium = [r for r in results if r.analyte is Analyte.POTASSIUM and r.specimen in LAB_BLOOD]

    measured: dict[int, list[_Rise]] = {}

    def measure(i: int) -> list[_Rise]:
        # The rise and the projection ask the same of each point: work it out once.
        if i not in measured:
            measured[i] = _measure(points[: i + 1], potassium, policy)
        return measured[i]

    def rise(i: int) -> _Assessment | None:
        return _rise(measure(i))

    def projected(i: int) -> _Assessment | None:
        return _projected(points[: i + 1], measure(i), policy)

    def fall(i: int) -> _Assessment | None:
        return _fall(points[: i + 1], results, exposures, policy)

    def crisis_fall(i: int) -> _Assessment | None:
        return _crisis_fall(points[: i + 1], results, exposures, policy)

    findings: dict[str, Finding] = {}
    assessments: list[tuple[str, Callable[[int], _Assessment | None]]] = [
        ("rise", rise), ("projected", projected), ("fall", fall), ("crisis_fall", crisis_fall)
    ]
    for name, assess in assessments:
        start = trailing_run_start(len(points), lambda i: assess(i) is not None)  # noqa: B023
        if start is None:
            continue
        current = assess(len(points) - 1)
        assert current is not None  # the run ends at the last point, so it fires there
        findings[name] = Finding.of(
            rule=current.rule,
            patient=patient,
            priority=current.priority,
            evidence=current.evidence,
            numbers=current.numbers,
            sentence=current.sentence,
            onset=points[start].result.effective,
            encounter=points[-1].result.encounter,
        )
    return list(findings.values())


def _points(results: Sequence[LabResult], policy: Policy) -> list[_Point]:
    """Each sodium once, with everything the rules ask of it worked out here rather than per window."""
    window = timedelta(minutes=policy.derived.pairing_minutes)
    glucose = exact(r for r in results if r.analyte is Analyte.GLUCOSE and r.specimen in LAB_BLOOD)
    osmolality = exact(
        r for r in results
        if r.analyte is Analyte.OSMOLALITY and r.specimen is Specimen.SERUM_PLASMA and not r.calculated
    )
    stand_down = policy.sodium.rise.stand_down_measured_osmolality_at_least
    threshold = policy.derived.corrected_sodium_from_glucose
    # Pair only where a pairing can matter: with a high glucose, and for a sodium low enough to be
    # a hyponatraemic nadir.
    high_glucose = [g for g in glucose if g.value is not None and g.value >= threshold]
    points = []
    for na in exact(r for r in results if r.analyte is Analyte.SODIUM and r.specimen in policy.sodium.specimens):
        assert na.value is not None
        judged = judged_corrected_sodium(na, glucose, policy) if high_glucose else None
        value, glu = judged if judged is not None else (na.value, None)
        osm = pair_nearest(na, osmolality, window) if osmolality and value < policy.sodium.rise.applies_below else None
        hypertonic = osm is not None and osm.value is not None and osm.value >= stand_down
        points.append(_Point(na, value, glu, na.method, hypertonic))
    return points


def _allowance(a: _Point, b: _Point, policy: Policy) -> float:
    same = a.method is b.method and a.method is not Method.UNKNOWN
    return 0.0 if same else policy.sodium.method_bias_allowance


def _earlier(points: Sequence[_Point], span: timedelta) -> list[_Point]:
    """Points drawn strictly before the latest one and no more than ``span`` before it."""
    end = points[-1].result.effective
    return [p for p in points[:-1] if end - span <= p.result.effective < end]


def _lowest(points: Sequence[_Point], span: timedelta, policy: Policy) -> _Change | None:
    """The change from the reference that shows the largest rise beyond method allowance; of
    equals, the latest (a rise is measured from where it began)."""
    current = points[-1]
    best: _Change | None = None
    for p in _earlier(points, span):
        change = _Change(p, current, _allowance(p, current, policy))
        if best is None or change.amount - change.allowance >= best.amount - best.allowance:
            best = change
    return best


def _highest(points: Sequence[_Point], span: timedelta, policy: Policy) -> _Change | None:
    """The change from the reference that shows the largest fall beyond method allowance."""
    current = points[-1]
    best: _Change | None = None
    for p in _earlier(points, span):
        change = _Change(p, current, _allowance(p, current, policy))
        if best is None or -change.amount - change.allowance >= -best.amount - best.allowance:
            best = change
    return best


@dataclass(frozen=True, slots=True)
class _Rise:
    change: _Change
    limit: float
    window: int
    risk: tuple[str, ...]  # references proving high risk; empty when normal risk
    risk_words: str

    @property
    def beyond(self) -> float:
        """The rise that counts: the measured rise less any method allowance."""
        return self.change.amount - self.change.allowance


def _measure(points: Sequence[_Point], potassium: Sequence[LabResult], policy: Policy) -> list[_Rise]:
    """The 24 h and 48 h rise of the latest sodium (when its nadir is in range), 24 h first."""
    rules = policy.sodium.rise
    day, two_days = _lowest(points, _DAY, policy), _lowest(points, _TWO_DAYS, policy)
    if day is None or two_days is None:
        return []
    current = points[-1]
    risk: list[str] = []
    words: list[str] = []
    if two_days.ref.value <= rules.high_risk_nadir_at_or_below:
        risk.append(two_days.ref.result.reference)
        words.append(f"nadir {fmt(two_days.ref.value)}")
    end = current.result.effective
    low_k = [
        k for k in potassium
        if end - _TWO_DAYS <= k.effective <= end and below(k, rules.high_risk_potassium_below) is Verdict.DANGER
    ]
    if low_k:
        risk.append(low_k[-1].reference)
        words.append(f"potassium {low_k[-1].comparator or ''}{fmt(low_k[-1].value or 0.0)}")
    limit24 = rules.limit_24h_high_risk if risk else rules.limit_24h
    if hours(two_days.ref.result.effective, end) > 24.0:
        limit24 = min(limit24, rules.limit_24h_after_first_day)
    measured = []
    for change, limit, window in ((day, limit24, 24), (two_days, rules.limit_48h, 48)):
        if change.ref.value < rules.applies_below and not change.ref.hypertonic:
            measured.append(
                _Rise(change=change, limit=limit, window=window,
                      risk=tuple(risk) if window == 24 else (),
                      risk_words=", ".join(words) if window == 24 else "")
            )
    return measured


def _rise(measured: Sequence[_Rise]) -> _Assessment | None:
    for m in measured:
        if m.beyond > m.limit:
            c = m.change
            risk = f" (high risk: {m.risk_words})" if m.risk else ""
            return _Assessment(
                rule=Rule.SODIUM_RISE_TOO_FAST,
                priority=Priority.HIGH,
                evidence=(*c.ref.refs, *c.current.refs, *m.risk),
                numbers=_numbers(m),
                sentence=(
                    f"{c.label()} rose {fmt(c.amount)} mmol/L in {fmt(c.hours)} h, from {fmt(c.ref.value)} "
                    f"to {fmt(c.current.value)}{c.details()}; limit {fmt(m.limit)} mmol/L in any "
                    f"{m.window} h{risk}."
                ),
            )
    return None


def _projected(points: Sequence[_Point], measured: Sequence[_Rise], policy: Policy) -> _Assessment | None:
    rules = policy.sodium.rise
    if any(m.beyond > m.limit for m in measured):
        return None  # already crossed: the rise finding speaks instead
    day = next((m for m in measured if m.window == 24), None)
    if day is None:
        return None
    # A projection extrapolates one analyser's trend: a step between methods is no trend.
    current = points[-1]
    same = [p for p in points if p.method is current.method]
    change = _lowest(same, _DAY, policy) if current.method is not Method.UNKNOWN else None
    if change is None or change.ref.value >= rules.applies_below:
        return None
    after = [p for p in same if p.result.effective > change.ref.result.effective]
    if (
        len(after) < rules.projection_min_results_after_nadir
        or change.amount <= rules.projection_min_change
        or change.hours < rules.projection_min_hours
    ):
        return None
    rate = change.amount / change.hours
    projection = rate * 24.0
    if projection <= day.limit:
        return None
    risk = f" (high risk: {day.risk_words})" if day.risk else ""
    numbers = _numbers(_Rise(change, day.limit, 24, day.risk, day.risk_words))
    return _Assessment(
        rule=Rule.SODIUM_RISE_PROJECTED,
        priority=Priority.MEDIUM,
        evidence=(*change.ref.refs, *change.current.refs, *day.risk),
        numbers=numbers | {"rate_per_hour": rate, "projected_rise_24h": projection},
        # Worded as a pace, never as a level: "would rise 15 mmol/L in 24 h", not "reach 15".
        sentence=(
            f"{change.label()} rose {fmt(change.amount)} mmol/L in {fmt(change.hours)} h from a nadir of "
            f"{fmt(change.ref.value)} mmol/L{change.details()} ({fmt(rate)} mmol/L/h); at this pace "
            f"{change.label().lower()} would rise {fmt(projection)} mmol/L in 24 h; limit {fmt(day.limit)} "
            f"mmol/L in any 24 h{risk}."
        ),
    )


def _numbers(m: _Rise) -> dict[str, float]:
    c = m.change
    return c.numbers() | {
        "rise": c.amount,
        "nadir": c.ref.value,
        "sodium": c.current.value,
        "limit": m.limit,
        "window_hours": float(m.window),
        "high_risk": 1.0 if m.risk else 0.0,
    }


def _fall(
    points: Sequence[_Point], results: Sequence[LabResult], exposures: Sequence[InsulinExposure], policy: Policy
) -> _Assessment | None:
    rules = policy.sodium.fall
    change = _highest(points, _DAY, policy)
    if change is None or change.ref.value <= rules.applies_above:
        return None
    if crisis_at(change.ref.result.effective, results, exposures, policy) is not None:
        return None  # a fall that began in a crisis is judged by the crisis limit, not this one
    fall = -change.amount
    beyond = fall - change.allowance
    span = change.hours
    numbers = change.numbers() | {
        "fall": fall,
        "peak": change.ref.value,
        "sodium": change.current.value,
        "limit": rules.limit_24h,
        "max_rate_per_hour": rules.max_rate_per_hour,
    }
    base = f"{change.label()} fell {fmt(fall)} mmol/L in {fmt(span)} h"
    values = f"from {fmt(change.ref.value)} to {fmt(change.current.value)}{change.details()}"
    if beyond > rules.limit_24h:
        sentence = f"{base}, {values}; limit {fmt(rules.limit_24h)} mmol/L in any 24 h."
    elif span >= rules.rate_min_hours and beyond / span > rules.max_rate_per_hour:
        numbers["rate_per_hour"] = fall / span
        sentence = (
            f"{base} ({fmt(fall / span)} mmol/L/h), {values}; limit {fmt(rules.max_rate_per_hour)} "
            f"mmol/L/h over {fmt(rules.rate_min_hours)} h or more."
        )
    else:
        return None
    return _Assessment(
        rule=Rule.SODIUM_FALL_TOO_FAST,
        priority=Priority.MEDIUM,
        evidence=(*change.ref.refs, *change.current.refs),
        numbers=numbers,
        sentence=sentence,
    )


def _crisis_fall(
    points: Sequence[_Point], results: Sequence[LabResult], exposures: Sequence[InsulinExposure], policy: Policy
) -> _Assessment | None:
    rules = policy.sodium.crisis_fall
    change = _highest(points, _DAY, policy)
    if change is None:
        return None
    fall = -change.amount
    if fall - change.allowance <= rules.limit_24h:
        return None
    crisis = crisis_at(change.ref.result.effective, results, exposures, policy)
    if crisis is None:
        return None
    return _Assessment(
        rule=Rule.SODIUM_FALL_IN_CRISIS,
        priority=rules.priority,
        evidence=(*change.ref.refs, *change.current.refs, *crisis.evidence),
        numbers=change.numbers() | {"fall": fall, "peak": change.ref.value, "sodium": change.current.value,
                                    "limit": rules.limit_24h},
        sentence=(
            f"{change.label()} fell {fmt(fall)} mmol/L in {fmt(change.hours)} h during a hyperglycaemic "
            f"crisis ({crisis.because}), from {fmt(change.ref.value)} to {fmt(change.current.value)}"
            f"{change.details()}; limit {fmt(rules.limit_24h)} mmol/L in 24 h. A falling corrected sodium "
            "during treatment is a recognised warning sign of cerebral oedema."
        ),
    )
