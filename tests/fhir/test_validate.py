"""Structural validation: FHIRPath of each problem, and the repeated-element shortcut equals a full check."""

from __future__ import annotations

import copy
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from service.fhir.validate import full_validation, validate_resource
from tests.factories import observation


def base() -> dict[str, Any]:
    obs = observation(category=[{"coding": [{"system": "http://terminology.hl7.org/CodeSystem/observation-category",
                                             "code": "laboratory"}]}],
                      performer=[{"reference": "Organization/lab"}],
                      referenceRange=[{"low": {"value": 135, "unit": "mmol/L"}, "high": {"value": 145}}])
    return obs


def test_two_value_choices_name_each_variant_sent() -> None:
    obs = base() | {"valueString": "high"}
    (issue,) = validate_resource(obs, "Observation")
    assert issue.expression == ("Observation.valueQuantity", "Observation.valueString")
    assert "value[x]" in issue.message


def test_unknown_element_is_a_structure_issue() -> None:
    (issue,) = validate_resource(base() | {"triggeredBy": []}, "Observation")  # R5-only element
    assert issue.code == "structure" and issue.expression == ("Observation.triggeredBy",)


BREAKS: list[tuple[tuple[str | int, ...], Any]] = [
    (("status",), None),
    (("code",), None),
    (("code", "coding"), "x"),
    (("category", 0, "coding", 0, "system"), 7),
    (("performer", 0, "reference"), {"a": 1}),
    (("referenceRange", 0, "low", "value"), "low"),
    (("valueQuantity", "value"), "abc"),
    (("effectiveDateTime",), "2026-13-01"),
    (("subject", "reference"), 5),
    (("identifier",), "R1"),
    (("valueString",), "and a second value"),
    (("encounter",), []),
]


def _apply(obs: dict[str, Any], path: tuple[str | int, ...], value: Any) -> dict[str, Any]:
    out = copy.deepcopy(obs)
    node: Any = out
    for part in path[:-1]:
        try:
            node = node[part]
        except (KeyError, IndexError, TypeError):
            return out  # an earlier break already removed this branch
        if not isinstance(node, (dict, list)):
            return out
    if value is None:
        node.pop(path[-1], None)
    else:
        node[path[-1]] = value
    return out


@settings(max_examples=80, deadline=None)
@given(breaks=st.lists(st.sampled_from(BREAKS), max_size=3), warm=st.booleans())
def test_shortcut_gives_the_same_issues_as_a_full_validation(breaks: list[Any], warm: bool) -> None:
    if warm:  # the repeated elements of the base have passed once before
        assert validate_resource(base(), "Observation") == []
    obs = base()
    for path, value in breaks:
        obs = _apply(obs, path, value)
    fast = validate_resource(copy.deepcopy(obs), "Observation")
    full = full_validation(copy.deepcopy(obs), "Observation")
    assert {(i.code, i.expression) for i in fast} == {(i.code, i.expression) for i in full}
