"""A watched result sent under a mistyped code is named, with the likely mistake, not dropped bare.

Codes and names: LOINC 2951-2 "Sodium [Moles/volume] in Serum or Plasma" and 2823-3 "Potassium
[Moles/volume] in Serum or Plasma" (LOINC); 2160-0 is creatinine in serum or plasma (LOINC), a code
we do not watch. Check digits: the LOINC mod-10 algorithm (LOINC Users' Guide, "Calculating Mod 10
check digits"): 2951-2's is 2, so 2951-3 cannot be a LOINC code. LOINC's system URI is
http://loinc.org and its OID 2.16.840.1.113883.6.1 (FHIR R4, "Using Codes in resources",
terminologies-systems.html: the URI is to be used, not the OID).
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.domain.catalogue import CATALOGUE, LOINC_SYSTEM, loinc_check_digit
from service.domain.code_mistakes import likely_mistake


def test_a_wrong_check_digit_of_a_watched_code_names_the_code_it_was_likely_meant_to_be() -> None:
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": "2951-3"}])
    assert said is not None
    assert "2951-3" in said and "check digit" in said and "2951-2" in said and "Sodium" in said


def test_a_watched_code_under_a_mistyped_system_names_the_system_and_loincs() -> None:
    said = likely_mistake([{"system": "http://loinc.com", "code": "2951-2"}])
    assert said is not None
    assert "http://loinc.com" in said and "http://loinc.org" in said and "Sodium" in said


def test_a_watched_code_with_no_system_says_the_system_is_missing() -> None:
    said = likely_mistake([{"code": "2823-3"}])
    assert said is not None
    assert "no system" in said and "http://loinc.org" in said and "Potassium" in said


def test_loincs_oid_as_the_system_is_named_as_such() -> None:
    said = likely_mistake([{"system": "urn:oid:2.16.840.1.113883.6.1", "code": "2951-2"}])
    assert said is not None and "OID" in said and "http://loinc.org" in said


def test_a_watched_code_without_its_check_digit_is_named() -> None:
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": "2951"}])
    assert said is not None and "2951-2" in said


def test_a_valid_loinc_code_we_do_not_watch_is_no_mistake() -> None:
    assert likely_mistake([{"system": LOINC_SYSTEM, "code": "2160-0"}]) is None


def test_a_code_of_another_system_is_no_mistake() -> None:
    # The same characters under SNOMED CT are a SNOMED CT matter, not a LOINC typo.
    assert likely_mistake([{"system": "http://snomed.info/sct", "code": "2951-2"}]) is None


def test_an_unwatched_code_with_a_wrong_check_digit_is_still_said_to_be_invalid() -> None:
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": "2160-1"}])
    assert said is not None and "check digit" in said and "2160-0" in said


@given(st.sampled_from(sorted(CATALOGUE)), st.integers(0, 9))
def test_every_watched_code_with_any_other_check_digit_is_named(code: str, digit: int) -> None:
    base, check = code.split("-")
    if digit == int(check):
        return
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": f"{base}-{digit}"}])
    assert said is not None and code in said
    assert loinc_check_digit(base) == int(check)  # the catalogue itself is sound


@settings(deadline=None)  # the first example pays for imports; a deadline would make that a flake
@given(st.lists(st.fixed_dictionaries({}, optional={"system": st.one_of(st.text(), st.integers(), st.none()),
                                                    "code": st.one_of(st.text(), st.integers(), st.none())}),
                max_size=3))
def test_odd_codings_never_raise(codings: list[dict[str, object]]) -> None:
    likely_mistake(codings)


@pytest.mark.parametrize("junk", [None, 3, "x", [1, "a", None]])
def test_codings_that_are_not_objects_are_ignored(junk: object) -> None:
    assert likely_mistake(junk if isinstance(junk, list) else [junk]) is None  # type: ignore[list-item]


def test_a_wrong_check_digit_with_no_system_names_both_mistakes() -> None:
    said = likely_mistake([{"code": "2951-3"}])
    assert said is not None
    assert "2951-3" in said and "check digit should be 2" in said and "2951-2" in said and "Sodium" in said
    assert "no system" in said and "http://loinc.org" in said


def test_a_wrong_check_digit_under_a_mistyped_system_names_both_mistakes() -> None:
    said = likely_mistake([{"system": "http://loinc.com", "code": "2823-4"}])
    assert said is not None
    assert "check digit should be 3" in said and "2823-3" in said and "Potassium" in said
    assert "http://loinc.com" in said and "http://loinc.org" in said


def test_a_missing_check_digit_with_no_system_names_the_watched_code() -> None:
    said = likely_mistake([{"code": "2951"}])
    assert said is not None and "2951-2" in said and "no system" in said


def test_an_invalid_code_with_no_system_near_no_watched_code_is_not_claimed_for_loinc() -> None:
    # Without a system, a code that is no LOINC code and near none we watch may be anyone's code.
    assert likely_mistake([{"code": "2160-1"}]) is None


def test_a_mistyped_digit_in_the_body_names_the_watched_code_one_digit_away() -> None:
    # 2952-2: the check digit of 2952 is 0 (LOINC mod-10), so 2952-2 is no LOINC code; it is one digit
    # from 2951-2, serum sodium.
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": "2952-2"}])
    assert said is not None and "2952-2" in said and "not a valid LOINC code" in said
    assert "2951-2" in said and "Sodium" in said and "one digit" in said


def test_two_swapped_digits_name_the_watched_code() -> None:
    # 2591-2: the check digit of 2591 is 6, so it is no LOINC code; swapping 5 and 9 gives 2951-2.
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": "2591-2"}])
    assert said is not None and "2951-2" in said and "swapped" in said


def _one_digit_changes(code: str) -> list[str]:
    out = []
    for i, ch in enumerate(code):
        if ch.isdigit():
            out += [code[:i] + d + code[i + 1:] for d in "0123456789" if d != ch]
    return out


@given(st.sampled_from(sorted(CATALOGUE)), st.data())
def test_any_single_digit_typo_of_a_watched_code_that_is_no_loinc_code_names_it(code: str, data: st.DataObject) -> None:
    typo = data.draw(st.sampled_from(_one_digit_changes(code)))
    base, check = typo.split("-")
    if loinc_check_digit(base) == int(check):
        return  # a valid LOINC code of its own: not ours to second-guess
    for system in (LOINC_SYSTEM, None, "http://loinc.com"):
        coding = {"code": typo} if system is None else {"system": system, "code": typo}
        said = likely_mistake([coding])
        assert said is not None and code in said, (typo, system)


def test_a_typo_between_two_watched_codes_names_both() -> None:
    # 3094-6 fails the check digit (3094's is 0): it is the check digit of 3094-0 (urea nitrogen) or
    # one digit of 3091-6 (urea) wrong; both are watched (LOINC), so both are named.
    said = likely_mistake([{"system": LOINC_SYSTEM, "code": "3094-6"}])
    assert said is not None and "3094-0" in said and "3091-6" in said
