"""FHIR search parameter values → query bounds. Pure."""

from __future__ import annotations

import math
import re
from collections.abc import Collection
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from service.errors import Issue, RequestRejected
from service.fhir.datetimes import without_leap_second

__all__ = ["Token", "acknowledged_param", "codes_in_system", "date_bounds", "intersect", "minutes_param", "tokens"]

_PREFIX = re.compile(r"^(eq|ge|gt|le|lt)?(\d{4}(-\d{2}(-\d{2}(T.+)?)?)?)$")


def _range(text: str) -> tuple[datetime, datetime]:
    """The implicit range a FHIR date value covers (a day, a month, a year, or an instant)."""
    if "T" in text:
        read = without_leap_second(text)
        start = datetime.fromisoformat(read.replace("Z", "+00:00"))
        if start.tzinfo is None:
            raise ValueError("a search date-time needs a UTC offset")
        start = start.astimezone(UTC)
        # A leap second (23:59:60, which FHIR allows) is read as the last instant of second 59, as
        # stored results are; its second is then that last microsecond.
        return start, start + (timedelta(microseconds=1) if read != text else timedelta(seconds=1))
    parts = [int(p) for p in text.split("-")]
    if len(parts) == 3:
        start = datetime(parts[0], parts[1], parts[2], tzinfo=UTC)
        return start, start + timedelta(days=1)
    if len(parts) == 2:
        start = datetime(parts[0], parts[1], 1, tzinfo=UTC)
        end = datetime(parts[0] + parts[1] // 12, parts[1] % 12 + 1, 1, tzinfo=UTC)
        return start, end
    return datetime(parts[0], 1, 1, tzinfo=UTC), datetime(parts[0] + 1, 1, 1, tzinfo=UTC)


def date_bounds(values: list[str], name: str = "date") -> tuple[datetime | None, datetime | None]:
    """[from, to) for repeated ``date`` parameters (AND); RequestRejected names a bad value."""
    low: datetime | None = None
    high: datetime | None = None
    for value in values:
        m = _PREFIX.match(value)
        try:
            if not m:
                raise ValueError("not a FHIR date")
            start, end = _range(m.group(2))
        except (ValueError, OverflowError) as exc:  # OverflowError: years 1 and 9999 with an offset
            raise RequestRejected([Issue("value", f"search parameter {name}={value!r}: {exc}; use e.g. "
                                         "ge2024-03-01 or lt2024-03-01T10:00:00Z")]) from exc
        prefix = m.group(1) or "eq"
        lo, hi = {"eq": (start, end), "ge": (start, None), "gt": (end, None),
                  "le": (None, end), "lt": (None, start)}[prefix]
        if lo is not None:
            low = lo if low is None else max(low, lo)
        if hi is not None:
            high = hi if high is None else min(high, hi)
    return low, high


@dataclass(frozen=True)
class Token:
    """One token value (search.html#token): ``system|code``, ``|code`` (no system) or ``code`` (any system)."""

    system: str | None
    code: str

    def in_system(self, system: str) -> bool:
        return self.system is None or self.system == system


def tokens(value: str) -> list[Token]:
    """The comma-separated (OR) tokens of one parameter value."""
    out = []
    for part in value.split(","):
        if not part:
            continue
        system, bar, code = part.rpartition("|")
        out.append(Token(system if bar else None, code))
    return out


def codes_in_system(values: list[str], system: str, name: str, known: Collection[str] | None = None
                    ) -> list[set[str]]:
    """Per repeated parameter (AND), the codes (OR) that can match in ``system``.

    A token of another system matches nothing here (an empty set); a code of ``system`` that ``known`` does not
    hold is a mistake, not a query for nothing, and is refused naming the codes there are.
    """
    out = []
    for value in values:
        codes = set()
        for t in tokens(value):
            if not t.in_system(system):
                continue
            if known is not None and t.code not in known:
                raise RequestRejected([Issue("value", f"search parameter {name}={t.code!r} is not a code this "
                                             f"server knows; one of: {', '.join(sorted(known))}")])
            codes.add(t.code)
        out.append(codes)
    return out


def intersect(per_value: list[set[str]]) -> set[str] | None:
    """AND of the repeats: the codes all of them allow, or None when the parameter was not given."""
    if not per_value:
        return None
    result = set(per_value[0])
    for codes in per_value[1:]:
        result &= codes
    return result


_BOOLEAN = {"true": True, "false": False}
_NUMBER_PREFIXES = ("eq", "gt", "ge", "lt", "le")


def acknowledged_param(values: list[str]) -> bool | None:
    """``acknowledged=true|false`` (one value; repeats must agree); None when absent."""
    seen = {v.strip().lower() for v in values}
    if not seen:
        return None
    if not seen <= set(_BOOLEAN) or len(seen) > 1:
        raise RequestRejected([Issue("value", f"acknowledged must be true or false, not {', '.join(sorted(seen))}")])
    return _BOOLEAN[seen.pop()]


def minutes_param(values: list[str], name: str) -> list[tuple[str, float]]:
    """A number search parameter in minutes with its prefix (search.html#prefix: eq gt ge lt le; none = eq);
    repeats are ANDed, e.g. ``gt30&lt120``."""
    out = []
    for value in values:
        text = value.strip()
        prefix = text[:2] if text[:2] in _NUMBER_PREFIXES else "eq"
        number = text[2:] if text[:2] in _NUMBER_PREFIXES else text
        try:
            minutes = float(number)
        except ValueError:
            raise RequestRejected([Issue("value", f"{name}={value!r} is not a number of minutes with an optional "
                                         "prefix (eq, gt, ge, lt, le), e.g. gt30")]) from None
        if not math.isfinite(minutes):
            raise RequestRejected([Issue("value", f"{name}={value!r} is not a finite number")])
        out.append((prefix, minutes))
    return out
