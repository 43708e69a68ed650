"""The likely mistake behind an Observation code we do not watch, when it looks like one we do.

A feed that sends serum sodium as ``2951-3`` (a typo: no LOINC code has that check digit) or under
``http://loinc.com`` would otherwise lose every sodium without a word. Pure: codings in, words out.

Sources: LOINC Users' Guide, "Calculating Mod 10 check digits"; FHIR R4 terminologies-systems.html
(LOINC's system is http://loinc.org; its OID 2.16.840.1.113883.6.1 is not to be used as the system).
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from typing import Any

from service.domain.catalogue import LOINC_SYSTEM, loinc_check_digit, lookup

__all__ = ["likely_mistake"]

_LOINC_OID = "urn:oid:2.16.840.1.113883.6.1"
_SHAPE = re.compile(r"(\d{1,7})(?:-(\d))?")


def likely_mistake(codings: Iterable[Any]) -> str | None:
    """Why these codings probably meant a code we watch, or an invalid LOINC code; None if neither."""
    for coding in codings:
        if not isinstance(coding, Mapping):
            continue
        code, system = coding.get("code"), coding.get("system")
        if not isinstance(code, str):
            continue
        code = code.strip()
        said = _wrong_system(code, system) or (_wrong_code(code) if system == LOINC_SYSTEM else None)
        if said:
            return said
    return None


def _wrong_system(code: str, system: Any) -> str | None:
    entry = lookup(code)
    if entry is None or system == LOINC_SYSTEM:
        return None
    what = f"{code} is {entry.display} in LOINC, which lytestream watches"
    if system is None or system == "":
        return f"{what}, but the coding has no system; LOINC's system is {LOINC_SYSTEM}"
    if not isinstance(system, str):
        return None
    if system == _LOINC_OID:
        return f"{what}, but its system is LOINC's OID; FHIR identifies LOINC by {LOINC_SYSTEM}"
    if "loinc" in system.lower():
        return f"{what}, but its system is {system}; LOINC's system is {LOINC_SYSTEM}"
    return None  # another code system's code that happens to read the same


def _wrong_code(code: str) -> str | None:
    m = _SHAPE.fullmatch(code)
    if m is None:
        return None
    base, given = m.group(1), m.group(2)
    right = f"{base}-{loinc_check_digit(base)}"
    entry = lookup(right)
    meant = f"; {right} is {entry.display}, which lytestream watches" if entry else ""
    if given is None:
        return f"{code} lacks the LOINC check digit: the code would be {right}{meant}" if entry else None
    if right == code:
        return None
    return f"{code} is not a valid LOINC code: its check digit should be {right[-1]} ({right}){meant}"
