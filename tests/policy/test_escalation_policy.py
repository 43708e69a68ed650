"""The [escalation] policy: minutes per priority (default high 15, medium 60: common practice, no source)."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.domain.findings import Priority
from service.policy import PolicyError, load_policy
from tests.policy.test_policy import default_text, write


def test_default_escalates_high_after_15_and_medium_after_60_minutes_and_never_low() -> None:
    assert dict(load_policy().escalation.after_minutes) == {Priority.HIGH: 15.0, Priority.MEDIUM: 60.0}


def test_an_unknown_priority_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("medium = 60.0", "urgent = 60.0", 1)
    with pytest.raises(PolicyError, match=r"^escalation\.after_minutes\.urgent"):
        load_policy(write(tmp_path, text))


def test_a_non_positive_interval_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("medium = 60.0", "medium = 0", 1)
    with pytest.raises(PolicyError, match=r"^escalation\.after_minutes\.medium: must be > 0"):
        load_policy(write(tmp_path, text))


def test_a_profile_can_add_a_priority(tmp_path: Path) -> None:
    text = default_text() + "\n[profiles.paediatric.escalation.after_minutes]\nlow = 240.0  # test value\n"
    child = load_policy(write(tmp_path, text), profile="paediatric")
    assert dict(child.escalation.after_minutes) == {Priority.HIGH: 15.0, Priority.MEDIUM: 60.0, Priority.LOW: 240.0}
