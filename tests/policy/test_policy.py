"""Policy loading: the packaged defaults, the hash, and errors that name the faulty key."""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

import pytest

from service.domain.values import Analyte, Specimen
from service.policy import Policy, PolicyError, load_policy, policy_hash


def default_text() -> str:
    return resources.files("service.policy").joinpath("default.toml").read_text("utf-8")


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "site.toml"
    path.write_text(text, "utf-8")
    return path


def test_default_policy_loads_from_package_data() -> None:
    policy = load_policy()
    assert isinstance(policy, Policy)
    assert policy.profile == "adult"


def test_default_thresholds_match_the_clinical_reference() -> None:
    p = load_policy()
    # RCPath G158 2017
    sodium = p.level_for(Analyte.SODIUM, Specimen.SERUM_PLASMA)
    assert sodium is not None and (sodium.low, sodium.high) == (120.0, 160.0)
    # Spasovski 2014 / Verbalis 2013 (from memory)
    assert (p.sodium.rise.limit_24h, p.sodium.rise.limit_24h_high_risk, p.sodium.rise.limit_48h) == (10, 8, 18)
    # Mustafa 2023 JBDS
    assert (p.crisis.osmolality_max_fall_per_hour, p.crisis.glucose_max_fall_per_hour) == (8, 5)
    # Umpierrez 2024 (from memory)
    assert p.insulin_potassium.below == 3.5


def test_default_file_carries_the_decision_support_caution() -> None:
    assert "decision support only" in default_text().lower()


def test_every_threshold_line_in_the_default_file_names_a_source() -> None:
    # Each numeric setting has a comment on its line or in the lines just above it.
    lines = default_text().splitlines()
    for i, line in enumerate(lines):
        stripped = line.split("#")[0].strip()
        if "=" in stripped and stripped.split("=")[1].strip()[:1].isdigit():
            context = " ".join(lines[max(0, i - 3) : i + 1])
            assert "#" in context, f"no source beside: {line}"


def test_hash_is_stable_across_loads() -> None:
    assert policy_hash(load_policy()) == policy_hash(load_policy())


def test_hash_does_not_depend_on_key_order_or_integer_spelling(tmp_path: Path) -> None:
    text = default_text().replace("limit_48h = 18.0", "limit_48h = 18")
    assert text != default_text()
    assert policy_hash(load_policy(write(tmp_path, text))) == policy_hash(load_policy())


def test_changing_a_threshold_changes_the_hash(tmp_path: Path) -> None:
    text = default_text().replace("limit_24h = 10.0 ", "limit_24h = 12.0 ", 1)
    changed = load_policy(write(tmp_path, text))
    assert changed.sodium.rise.limit_24h == 12.0
    assert policy_hash(changed) != policy_hash(load_policy())


def test_profiles_hash_differently() -> None:
    assert policy_hash(load_policy(profile="paediatric")) != policy_hash(load_policy())


def test_paediatric_profile_overrides_only_what_it_names() -> None:
    adult, child = load_policy(), load_policy(profile="paediatric")
    # Kitabchi 2009 (from memory): <=3 mOsm/kg/h
    assert child.crisis.osmolality_max_fall_per_hour == 3.0
    assert child.crisis.glucose_max_fall_per_hour == adult.crisis.glucose_max_fall_per_hour
    assert child.sodium.rise == adult.sodium.rise
    assert child.sodium.fall == adult.sodium.fall
    # ISPAD 2022 (from memory): a falling corrected sodium in a child's DKA is a warning sign
    assert child.sodium.crisis_fall.limit_24h < adult.sodium.crisis_fall.limit_24h


def test_an_unknown_key_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("limit_48h = 18.0", "limit_48h = 18.0\nlimit_72h = 24.0")
    with pytest.raises(PolicyError, match=r"sodium\.rise\.limit_72h: unknown key"):
        load_policy(write(tmp_path, text))


def test_a_non_positive_limit_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("limit_24h = 10.0 ", "limit_24h = 0 ", 1)
    with pytest.raises(PolicyError, match=r"^sodium\.rise\.limit_24h: must be > 0"):
        load_policy(write(tmp_path, text))


def test_a_wrongly_typed_value_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("recheck_hours = 2.0", 'recheck_hours = "two"')
    with pytest.raises(PolicyError, match=r"insulin_potassium\.recheck_hours:"):
        load_policy(write(tmp_path, text))


def test_a_missing_threshold_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("escalate_below = 3.0", "")
    with pytest.raises(PolicyError, match=r"insulin_potassium\.escalate_below: missing"):
        load_policy(write(tmp_path, text))


def test_a_level_with_low_above_high_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("high = 160.0", "high = 110.0")
    with pytest.raises(PolicyError, match=r"levels\.0: low must be below high"):
        load_policy(write(tmp_path, text))


def test_urine_is_refused_as_a_rule_specimen(tmp_path: Path) -> None:
    text = default_text().replace(
        'specimens = ["serum-plasma", "whole-blood"]\n# Whole-blood',
        'specimens = ["serum-plasma", "urine"]\n# Whole-blood',
    )
    with pytest.raises(PolicyError, match=r"^sodium: urine results never feed these rules"):
        load_policy(write(tmp_path, text))


def test_a_bad_value_in_a_profile_names_the_profile(tmp_path: Path) -> None:
    text = default_text().replace("osmolality_max_fall_per_hour = 3.0", "osmolality_max_fall_per_hour = -3.0", 1)
    with pytest.raises(PolicyError, match=r"profiles\.paediatric\.crisis\.osmolality_max_fall_per_hour: must be > 0"):
        load_policy(write(tmp_path, text))


def test_an_unknown_profile_is_refused() -> None:
    with pytest.raises(PolicyError, match=r"profile: unknown profile 'geriatric'"):
        load_policy(profile="geriatric")


def test_invalid_toml_is_refused(tmp_path: Path) -> None:
    with pytest.raises(PolicyError, match="not valid TOML"):
        load_policy(write(tmp_path, "profile = "))


def test_a_missing_file_is_refused(tmp_path: Path) -> None:
    with pytest.raises(PolicyError, match="cannot be read"):
        load_policy(tmp_path / "absent.toml")


def test_the_default_file_is_plain_toml() -> None:
    assert "levels" in tomllib.loads(default_text())


def test_default_timing_keys() -> None:
    # Common practice, no source: a few minutes of clock drift between systems; an hour's delay is notable.
    timing = load_policy().timing
    assert (timing.future_tolerance_minutes, timing.late_note_after_minutes) == (5, 60)


def test_a_negative_future_tolerance_is_refused_with_its_path(tmp_path: Path) -> None:
    text = default_text().replace("future_tolerance_minutes = 5", "future_tolerance_minutes = -1")
    with pytest.raises(PolicyError, match=r"^timing\.future_tolerance_minutes: must be >= 0"):
        load_policy(write(tmp_path, text))
