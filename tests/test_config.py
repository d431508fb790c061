"""Configuration and criteria: defaults as documented, overrides, errors in plain words."""

from __future__ import annotations

from pathlib import Path

import pytest

from calwarden.daemon.settings.config import load_config, parse_yaml
from calwarden.rules.criteria import AnalyteCriteria, Criteria, build_criteria
from calwarden.rules.errors import ConfigError
from calwarden.rules.evaluate import active_rules

CONFIG = Path(__file__).resolve().parent.parent / "config"


def test_documented_defaults_equal_the_code_defaults() -> None:
    """config/criteria.yaml holds exactly the defaults of rules/criteria.py."""
    written = load_config(CONFIG / "criteria.yaml").criteria
    assert written == Criteria()


def test_every_shipped_example_configuration_is_valid() -> None:
    """Each YAML file in config/ loads without error."""
    for path in sorted(CONFIG.glob("*.yaml")):
        load_config(path)


def test_per_analyte_override_changes_only_its_keys() -> None:
    """An analyte override changes the keys it names and keeps every other default."""
    criteria = build_criteria({"analytes": {"Zn": {"ccv_recovery_pct": [85, 115]}}})
    zinc = criteria.for_analyte("Zn")
    assert zinc.ccv_recovery_pct == (85, 115)
    assert zinc.icv_recovery_pct == AnalyteCriteria().icv_recovery_pct
    assert criteria.for_analyte("Cu") == AnalyteCriteria()


def test_misspelt_key_names_the_path_and_suggests_the_right_one(tmp_path: Path) -> None:
    """A misspelt key is reported with its dotted path and a did-you-mean hint."""
    path = tmp_path / "lab.yaml"
    path.write_text("criteria:\n  defaults:\n    min_r_sqared: 0.99\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"criteria\.defaults\.min_r_sqared: unknown key"
                       r" \(did you mean min_r_squared\?\)"):  # fmt: skip
        load_config(path)


def test_bad_override_value_names_the_analyte(tmp_path: Path) -> None:
    """A wrong value in an analyte override names that analyte and key."""
    path = tmp_path / "lab.yaml"
    path.write_text("criteria:\n  analytes:\n    Zn: {min_r_squared: 2}\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"analytes\.Zn: min_r_squared"):
        load_config(path)


def test_duplicate_yaml_key_is_refused() -> None:
    """A key given twice in the YAML is an error, not a silent last-one-wins."""
    with pytest.raises(ConfigError, match="line 3: key 'model' is given twice"):
        parse_yaml("defaults:\n  model: linear\n  model: quadratic\n", "lab.yaml")


def test_inverted_recovery_limits_are_refused() -> None:
    """A recovery window whose low end is above its high end is refused."""
    with pytest.raises(ConfigError, match="low limit"):
        build_criteria({"defaults": {"lcs_recovery_pct": [120, 80]}})


@pytest.mark.parametrize(
    "override",
    [{"ccv_recovery_pct": [float("nan"), float("nan")]}, {"ccv_recovery_pct": [90, float("nan")]}],
    ids=["both", "one"],
)
def test_nan_limits_are_refused(override: dict[str, object]) -> None:
    """A NaN limit (which every comparison would pass) is refused, for defaults and analytes."""
    with pytest.raises(ConfigError, match="NaN"):
        build_criteria({"defaults": override})
    with pytest.raises(ConfigError, match="NaN"):
        build_criteria({"analytes": {"Cu": override}})


def test_unknown_disabled_rule_is_a_config_error() -> None:
    """Switching off a rule id that does not exist is a configuration error."""
    with pytest.raises(ConfigError, match=r"unknown rule id 'check\.recovry'"):
        active_rules(build_criteria({"disabled_rules": ["check.recovry"]}))


def test_digest_ignores_the_order_of_disabled_rules() -> None:
    """The criteria hash does not change when disabled rules are listed in another order."""
    first = build_criteria({"disabled_rules": ["range.under", "calibration.linearity"]})
    second = build_criteria({"disabled_rules": ["calibration.linearity", "range.under"]})
    assert first.digest() == second.digest()


def test_yaml_syntax_error_names_the_line(tmp_path: Path) -> None:
    """Broken YAML is reported with its line, not a traceback."""
    path = tmp_path / "lab.yaml"
    path.write_text("criteria:\n  defaults: [unclosed\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(path)


def test_loading_a_configuration_checks_disabled_rule_ids(tmp_path: Path) -> None:
    """A configuration switching off an unknown rule is refused when it is loaded."""
    path = tmp_path / "lab.yaml"
    path.write_text("criteria:\n  disabled_rules: [range.undr]\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"lab\.yaml: criteria\.disabled_rules: unknown rule id"):
        load_config(path)


def test_analyte_override_matches_ignoring_case() -> None:
    """An override written for 'ZN' applies to analyte 'Zn', as header names match ignoring case."""
    criteria = build_criteria({"analytes": {"ZN": {"ccv_recovery_pct": [85, 115]}}})
    assert criteria.for_analyte("Zn").ccv_recovery_pct == (85, 115)


def test_two_overrides_for_one_analyte_are_refused() -> None:
    """Overrides under 'Zn' and 'zn' are refused: they name the same analyte."""
    with pytest.raises(ConfigError, match="name the same analyte"):
        build_criteria({"analytes": {"Zn": {}, "zn": {}}})


def test_required_qc_names_kinds_and_counts() -> None:
    """required_qc with an unknown kind or a negative count is a ConfigError naming the key."""
    for wrong in ({"icvv": 1}, {"ccv": -1}):
        with pytest.raises(ConfigError, match="required_qc"):
            build_criteria({"defaults": {"required_qc": wrong}})
