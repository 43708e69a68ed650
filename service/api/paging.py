"""Search plumbing shared by the search routes: paging, patient parameters, the searchset links."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any
from urllib.parse import urlencode

import orjson
from starlette.datastructures import QueryParams

from service.config import Settings
from service.errors import Issue, RequestRejected
from service.fhir.render import searchset

__all__ = ["Page", "check_params", "page_bundle", "patient_alias", "sort_param", "split_tokens"]


class Page:
    """``_count`` and ``_offset`` within the settings' limits."""

    def __init__(self, params: QueryParams, settings: Settings) -> None:
        count = _int(params.get("_count"), settings.page_size_default, "_count")
        self.count = min(max(count, 1), settings.page_size_max)
        self.offset = max(_int(params.get("_offset"), 0, "_offset"), 0)


def check_params(params: QueryParams, allowed: set[str]) -> None:
    unknown = sorted(set(params) - allowed - {"_format"})
    if unknown:
        raise RequestRejected([Issue("not-supported", f"search parameter(s) not supported: {', '.join(unknown)}; "
                                     f"supported: {', '.join(sorted(allowed))}")])


def sort_param(params: QueryParams, default: str) -> str:
    """``_sort``: date or _lastUpdated, ``-`` for descending."""
    sort = params.get("_sort", default)
    if sort.lstrip("-") not in ("date", "_lastUpdated"):
        raise RequestRejected([Issue("not-supported", "_sort supports date, -date, _lastUpdated, -_lastUpdated")])
    return sort


def split_tokens(params: QueryParams, name: str) -> list[str]:
    """Token values of a parameter (comma = OR, system|code keeps the code)."""
    return [c.split("|")[-1] for v in params.getlist(name) for c in v.split(",") if c]


def patient_alias(params: QueryParams) -> str | None:
    identifier = params.get("patient:identifier")
    if identifier:
        return f"id:{identifier}"
    reference = params.get("patient") or params.get("subject")
    if reference:
        return f"ref:{reference}" if "/" in reference else f"ref:Patient/{reference}"
    return None


def page_bundle(*, rtype: str, params: QueryParams, page: Page, rows: Sequence[bytes], total: int,
                settings: Settings, now: datetime, included: Sequence[bytes] = (),
                outcome: Sequence[Issue] = ()) -> dict[str, Any]:
    base = settings.base_url
    query = [(k, v) for k, v in params.multi_items() if k != "_offset"]
    self_url = f"{base}/{rtype}?{urlencode([*query, ('_offset', str(page.offset))])}"
    next_url = (f"{base}/{rtype}?{urlencode([*query, ('_offset', str(page.offset + page.count))])}"
                if page.offset + page.count < total else None)
    return searchset([orjson.loads(r) for r in rows], base=base, self_url=self_url, next_url=next_url,
                     total=total, now=now, included=[orjson.loads(r) for r in included], outcome=outcome)


def _int(value: str | None, default: int, name: str) -> int:
    if value is None:
        return default
    # Bounded as the database's 64-bit integers are: a larger one would overflow the query, not page.
    if not value.lstrip("-").isdigit() or len(value.lstrip("-")) > 18:
        raise RequestRejected([Issue("value", f"{name} must be a whole number below 10^18, not {value!r}")])
    return int(value)
