"""Search plumbing shared by the search routes: paging, patient parameters, the searchset links."""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from typing import Any
from urllib.parse import urlencode

import orjson
from starlette.datastructures import Headers, QueryParams

from service.config import Settings
from service.errors import Issue, RequestRejected
from service.fhir.render import searchset

__all__ = ["Page", "check_params", "page_bundle", "patient_alias", "search_params", "sort_param", "split_tokens",
           "strict_handling"]


class Page:
    """``_count``, ``_offset``, ``_summary=count`` and ``_total`` within the settings' limits.

    search.html#count: ``_count=0`` and ``_summary=count`` ask for the total and no entries.
    """

    def __init__(self, params: QueryParams, settings: Settings) -> None:
        count = _int(params.get("_count"), settings.page_size_default, "_count")
        self.summary_count = params.get("_summary") == "count"
        self.count = 0 if self.summary_count else min(max(count, 0), settings.page_size_max)
        self.offset = max(_int(params.get("_offset"), 0, "_offset"), 0)
        self.with_total = params.get("_total") != "none"


# Understood by every search: paging, the count-only forms and the format (JSON is all there is).
_CONTROL = {"_count", "_offset", "_format", "_total", "_summary"}
_CONTROL_VALUES = {"_summary": {"count", "false"}, "_total": {"none", "estimate", "accurate"}}


def strict_handling(headers: Headers) -> bool:
    """``Prefer: handling=strict`` (search.html#errors); lenient otherwise."""
    for value in headers.getlist("prefer"):
        for part in value.split(";"):
            key, _, setting = part.strip().partition("=")
            if key.strip().lower() == "handling" and setting.strip().strip('"').lower() == "strict":
                return True
    return False


def search_params(params: QueryParams, headers: Headers, supported: set[str]) -> tuple[QueryParams, list[Issue]]:
    """The parameters this search will use, and a warning for each it ignores.

    search.html#errors: a server ignores parameters (and modifiers, and values of its control parameters) it
    does not support unless the client sends ``Prefer: handling=strict``, when it refuses them. The kept
    parameters also make the links, so a self link says what was really searched.
    """
    allowed = supported | _CONTROL
    ignored = [(k, v) for k, v in params.multi_items()
               if k not in allowed or (k in _CONTROL_VALUES and v not in _CONTROL_VALUES[k])]
    if not ignored:
        return params, []
    names = sorted({k if k not in _CONTROL_VALUES else f"{k}={v}" for k, v in ignored})
    if strict_handling(headers):
        raise RequestRejected([Issue("not-supported", f"search parameter(s) not supported: {', '.join(names)}; "
                                     f"supported: {', '.join(sorted(allowed))} (Prefer: handling=strict)")])
    kept = QueryParams([(k, v) for k, v in params.multi_items() if (k, v) not in ignored])
    return kept, [Issue("not-supported", f"search parameter {name} is not supported here and was ignored",
                        severity="warning") for name in names]


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
    """The searchset of one page, with self, first, previous, next and last links (http.html#paging)."""
    base = settings.base_url
    query = [(k, v) for k, v in params.multi_items() if k != "_offset"]

    def at(offset: int) -> str:
        return f"{base}/{rtype}?{urlencode([*query, ('_offset', str(offset))])}"

    links: dict[str, str] = {"self": at(page.offset)}
    if page.count:
        last = max(total - 1, 0) // page.count * page.count
        links["first"] = at(0)
        if page.offset > 0:
            links["previous"] = at(max(min(page.offset, last + page.count) - page.count, 0))
        if page.offset + page.count < total:
            links["next"] = at(page.offset + page.count)
        links["last"] = at(last)
    return searchset([orjson.loads(r) for r in rows], base=base, links=links,
                     total=total if page.with_total else None, now=now,
                     included=[orjson.loads(r) for r in included], outcome=outcome)


def _int(value: str | None, default: int, name: str) -> int:
    if value is None:
        return default
    # Bounded as the database's 64-bit integers are: a larger one would overflow the query, not page.
    if not value.lstrip("-").isdigit() or len(value.lstrip("-")) > 18:
        raise RequestRejected([Issue("value", f"{name} must be a whole number below 10^18, not {value!r}")])
    return int(value)
