"""The [alerting] policy: worsening steps per analyte, in canonical units, validated like every threshold.

Defaults (common practice, no source): sodium 2, potassium 0.3, glucose 2 mmol/L; osmolality 5 mOsm/kg;
rates glucose 2 mmol/L/h, osmolality 2 mOsm/kg/h.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from service.domain.values import Analyte
from service.policy import PolicyError, load_policy
from tests.policy.test_policy import default_text, write


def test_default_worsening_steps_are_per_analyte_in_canonical_units() -> None:
    steps = load_policy().alerting
    assert [steps.step(a, per_hour=False) for a in (Analyte.SODIUM, Analyte.POTASSIUM, Analyte.GLUCOSE,
                                                    Analyte.OSMOLALITY)] == [2.0, 0.3, 2.0, 5.0]
    assert [steps.step(a, per_hour=True) for a in (Analyte.GLUCOSE, Analyte.OSMOLALITY)] == [2.0, 2.0]


def test_an_analyte_without_a_step_has_none() -> None:
    assert load_policy().alerting.step(Analyte.UREA, per_hour=False) is None


def test_a_non_positive_step_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("potassium = 0.3", "potassium = 0", 1)
    with pytest.raises(PolicyError, match=r"^alerting\.worsening_step\.potassium: must be > 0"):
        load_policy(write(tmp_path, text))


def test_a_missing_step_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("osmolality = 2.0  # mOsm/kg/h. Common practice, no source", "", 1)
    with pytest.raises(PolicyError, match=r"alerting\.worsening_step_per_hour\.osmolality: missing"):
        load_policy(write(tmp_path, text))
