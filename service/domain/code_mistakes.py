"""The likely mistake behind an Observation code we do not watch, when it looks like one we do.

A feed that sends serum sodium as ``2951-3`` (a typo: no LOINC code has that check digit), as
``2952-2`` (one digit wrong), or under ``http://loinc.com`` would otherwise lose every sodium without
a word. Pure: codings in, words out.

What counts as "looks like one we watch":
- a watched code under no system, LOINC's OID, or a system naming LOINC other than http://loinc.org;
- under LOINC's system (or one of those), a code that fails the LOINC check digit and is one digit,
  or two swapped neighbouring digits, away from a watched code, or lacks its check digit;
- under LOINC's system, any code failing the check digit (it cannot be a LOINC code at all).
A code that passes the check digit is a LOINC code of its own and is not second-guessed; nor is a
code of another system that merely reads the same.

Sources: LOINC Users' Guide, "Calculating Mod 10 check digits" (single-digit errors and most
transpositions fail it); FHIR R4 terminologies-systems.html (LOINC's system is http://loinc.org;
its OID 2.16.840.1.113883.6.1 is not to be used as the system).
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from typing import Any

from service.domain.catalogue import CATALOGUE, LOINC_SYSTEM, loinc_check_digit, lookup

__all__ = ["likely_mistake"]

_LOINC_OID = "urn:oid:2.16.840.1.113883.6.1"
_SHAPE = re.compile(r"([0-9]{1,7})(?:-([0-9]))?")


def _typo_index() -> dict[str, tuple[tuple[str, str], ...]]:
    """Every string one digit, or one swap of neighbouring digits, from a watched code → (code, how)."""
    index: dict[str, list[tuple[str, str]]] = {}
    for code in CATALOGUE:
        for i, ch in enumerate(code):
            if not ch.isdigit():
                continue
            for d in "0123456789":
                if d != ch:
                    index.setdefault(code[:i] + d + code[i + 1:], []).append((code, "one digit differs"))
            nxt = code[i + 1] if i + 1 < len(code) else ""
            if nxt.isdigit() and nxt != ch:
                swapped = code[:i] + nxt + ch + code[i + 2:]
                index.setdefault(swapped, []).append((code, "two neighbouring digits are swapped"))
    return {k: tuple(v) for k, v in index.items()}


# Built once: triage asks about every unwatched result, so this is a dict lookup, not a scan.
_TYPOS = _typo_index()


def likely_mistake(codings: Iterable[Any]) -> str | None:
    """Why these codings probably meant a code we watch, or an invalid LOINC code; None if neither."""
    for coding in codings:
        if not isinstance(coding, Mapping):
            continue
        code, system = coding.get("code"), coding.get("system")
        if not isinstance(code, str):
            continue
        code = code.strip()
        if system == LOINC_SYSTEM:
            said = _wrong_code(code, claim_any=True)
        else:
            said = _wrong_system(code, system)
        if said:
            return said
    return None


def _system_note(system: Any) -> str | None:
    """What is wrong with a system that stands for LOINC; None for another code system's."""
    if system is None or system == "":
        return f"the coding has no system; LOINC's system is {LOINC_SYSTEM}"
    if not isinstance(system, str):
        return None
    if system == _LOINC_OID:
        return f"its system is LOINC's OID; FHIR identifies LOINC by {LOINC_SYSTEM}"
    if "loinc" in system.lower():
        return f"its system is {system}; LOINC's system is {LOINC_SYSTEM}"
    return None  # another code system's code that happens to read the same


def _wrong_system(code: str, system: Any) -> str | None:
    note = _system_note(system)
    if note is None:
        return None
    entry = lookup(code)
    if entry is not None:
        return f"{code} is {entry.display} in LOINC, which lytestream watches, but {note}"
    # Both wrong: only when the code is near one we watch; otherwise it may be any system's code.
    wrong = _wrong_code(code, claim_any=False)
    return f"{wrong}; and {note}" if wrong else None


def _wrong_code(code: str, *, claim_any: bool) -> str | None:
    """What is wrong with a LOINC-shaped code that we do not watch. With ``claim_any`` (the coding
    says LOINC), any code failing the check digit is said to be invalid; else only one near ours."""
    m = _SHAPE.fullmatch(code)
    if m is None:
        return None
    base, given = m.group(1), m.group(2)
    right = f"{base}-{loinc_check_digit(base)}"
    entry = lookup(right)
    if given is None:
        if entry is None:
            return None
        return (f"{code} lacks the LOINC check digit: the code would be {right}; "
                f"{right} is {entry.display}, which lytestream watches")
    if right == code:
        return None  # a valid LOINC code, just not one we watch
    invalid = f"{code} is not a valid LOINC code: its check digit should be {right[-1]} ({right})"
    # One typo may sit between two watched codes (3094-6: check digit of 3094-0, or one digit of
    # 3091-6): name every candidate rather than guess.
    meant = [f"{right} is {entry.display}"] if entry is not None else []
    meant += [f"{c} ({how}) is {CATALOGUE[c].display}" for c, how in _TYPOS.get(code, ()) if c != right]
    if meant:
        return f"{invalid}; {' or '.join(meant)}, which lytestream watches"
    return invalid if claim_any else None
