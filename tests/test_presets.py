"""Method presets: each loads with a source for every value, overrides work, runs are judged."""

from __future__ import annotations

from pathlib import Path

import pytest

from calwarden.daemon.cli.main import main
from calwarden.daemon.parsing.native import decode_table, normalise
from calwarden.daemon.settings.config import build_config, load_config
from calwarden.daemon.settings.presets import PRESETS_DIR, load_preset, preset_names
from calwarden.rules.errors import ConfigError
from calwarden.rules.evaluate import evaluate
from calwarden.rules.verdict import Status

NAMES = preset_names()

HEADER = (
    "seq,sample_id,kind,analyte,response,nominal,dilution,parent,added,unit,"
    "retention_time,qualifier_response"
)


def _row(seq: int, name: str, kind: str, concentration: float, nominal: str = "") -> str:
    """One Zn injection whose response reads ``concentration`` off 100 + 1000·c."""
    response = 100 + 1000 * concentration
    return f"{seq},{name},{kind},Zn,{response:.1f},{nominal},,,,µg/L,6.21,{0.52 * response:.1f}"


def invented_run(ccv_found: float) -> str:
    """A run holding every QC element the presets ask for, its CCV reading ``ccv_found``."""
    rows = [_row(1, "CAL-BLK", "blank", 0.0)]
    levels = (1, 2, 5, 10, 20, 50)
    rows += [_row(2 + i, f"CAL-{i + 1}", "cal", c, str(c)) for i, c in enumerate(levels)]
    rows += [
        _row(8, "ICV", "icv", 10.05, "10"),
        _row(9, "ICS-A", "ics_a", 0.2),
        _row(10, "ICS-AB", "ics_ab", 19.6, "20"),
        _row(11, "CCB", "ccb", 0.1),
        _row(12, "MB", "mb", 0.1),
        _row(13, "LCS", "lcs", 9.8, "10"),
        _row(14, "S-1", "sample", 12.3),
        _row(15, "CCV-1", "ccv", ccv_found, "10"),
        _row(16, "CCB-1", "ccb", 0.05),
    ]
    return "\n".join([HEADER, *rows]) + "\n"


def test_presets_come_with_calwarden() -> None:
    """config/presets/ holds the five method presets the issue names."""
    assert set(NAMES) >= {
        "dw-metals-icpms",
        "metals-icpms",
        "metals-icpoes",
        "organics-gcms",
        "lcmsms-ion-ratio",
    }


@pytest.mark.parametrize("name", NAMES)
def test_every_preset_loads_and_every_value_names_its_source(name: str) -> None:
    """Each preset validates, and each criterion and switched-off rule carries a source."""
    preset = load_preset(name)
    assert preset.title and preset.method
    assert preset.criteria
    for item in (*preset.criteria, *preset.disabled_rules):
        assert item.source.strip(), item.key
        # A source names a method or guideline; a recalled one says so.
        assert any(c.isdigit() for c in item.source), item.source


# An invented run under each preset: a CCV at 86 % fails the metals presets (±10 %, US EPA
# 200.8 / 6010D / 6020B [memory]) and passes 8000D's ±20 % [memory]; the LC-MS/MS preset
# keeps calwarden's default ±10 %.
EXPECTED_AT_86 = {
    "dw-metals-icpms": Status.FAIL,
    "metals-icpms": Status.FAIL,
    "metals-icpoes": Status.FAIL,
    "organics-gcms": Status.PASS,
    "lcmsms-ion-ratio": Status.FAIL,
}


@pytest.mark.parametrize("name", NAMES)
def test_each_preset_judges_an_invented_run(name: str) -> None:
    """A good run passes every preset; a CCV at 86 % gives each preset its expected verdict."""
    criteria = build_config({"preset": name}, "test").criteria
    good = evaluate(normalise(decode_table(invented_run(10.1).encode())), criteria)
    assert good.status is Status.PASS, [f.message for f in good.findings if f.severity == "fail"]
    low = evaluate(normalise(decode_table(invented_run(8.6).encode())), criteria)
    assert low.status is EXPECTED_AT_86[name]


def test_explicit_criteria_override_the_preset() -> None:
    """A key the configuration sets wins over the preset's; the preset's others stay."""
    config = build_config(
        {"preset": "metals-icpms", "criteria": {"defaults": {"ccv_recovery_pct": [85, 115]}}},
        "test",
    )
    assert config.criteria.defaults.ccv_recovery_pct == (85.0, 115.0)
    assert config.criteria.defaults.istd_recovery_pct == (70.0, 120.0)  # the preset's


def test_an_unknown_preset_is_a_config_error_listing_the_presets() -> None:
    """`preset: NAME` that names no preset is refused, naming the ones there are."""
    with pytest.raises(ConfigError, match=r"no preset 'metals-icp'.*metals-icpms"):
        build_config({"preset": "metals-icp"}, "test")


def test_a_preset_value_without_a_source_is_refused(tmp_path: Path) -> None:
    """A preset file whose value has no source does not load."""
    (tmp_path / "lab.yaml").write_text(
        "title: Our metals\nmethod: in-house SOP 12\ncriteria:\n"
        "  ccv_recovery_pct: {value: [95, 105]}\n",
        encoding="utf-8",
    )
    (tmp_path / "config.yaml").write_text("preset: lab.yaml\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="ccv_recovery_pct: write it as"):
        load_config(tmp_path / "config.yaml")


def test_a_preset_file_is_found_beside_the_configuration(tmp_path: Path) -> None:
    """`preset: PATH` is read relative to the configuration file."""
    (tmp_path / "lab.yaml").write_text(
        "title: Our metals\nmethod: in-house SOP 12\ncriteria:\n"
        "  ccv_recovery_pct: {value: [95, 105], source: SOP 12 section 4}\n",
        encoding="utf-8",
    )
    (tmp_path / "config.yaml").write_text("preset: lab.yaml\n", encoding="utf-8")
    assert load_config(tmp_path / "config.yaml").criteria.defaults.ccv_recovery_pct == (95, 105)


def test_config_presets_lists_and_checks_them(capsys: pytest.CaptureFixture[str]) -> None:
    """`calwarden config presets` lists every preset with its method and exits 0."""
    assert main(["config", "presets"]) == 0
    out = capsys.readouterr().out
    for name in NAMES:
        assert name in out
    assert "not a substitute" in out


def test_rules_with_a_preset_shows_its_values_and_sources(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`calwarden rules --preset NAME` prints the preset's criteria beside their sources."""
    assert main(["rules", "--preset", "lcmsms-ion-ratio"]) == 0
    out = capsys.readouterr().out
    assert "ion_ratio_tolerance_pct: 30" in out
    assert "source: SANTE/11312/2021" in out


def test_presets_folder_is_in_the_repository() -> None:
    """The presets live in config/presets/, beside the other example configurations."""
    assert PRESETS_DIR.name == "presets" and PRESETS_DIR.parent.name == "config"
