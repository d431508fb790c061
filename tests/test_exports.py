"""Instrument exports: each example layout, read with its configuration, gives the same
verdict as the native fixture it mirrors (fixtures/exports/README.md)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from test_golden import reduce

from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import load_config

PROJECT = Path(__file__).resolve().parent.parent
#: export → (its configuration, the native fixture it mirrors, the native fixture's configuration)
EXPORTS = {
    "bwl-icpms-metals-pass.txt": ("export-icpms-semicolon.yaml", "bwl-metals-pass.csv", None),
    "bwl-lcms-herbicides.csv": ("export-lcms-wide.yaml", "bwl-lc-istd.csv", None),
    "bwl-icpms-metals-fail.xlsx": ("export-icpms-xlsx.yaml", "bwl-metals-fail.csv", None),
    "bwl-oes-cations.tsv": ("export-oes-tab.yaml", "bwl-quadratic.csv", "example.yaml"),
}


def _judge(path: Path, config_name: str | None) -> dict[str, object]:
    config = load_config(PROJECT / "config" / config_name if config_name else None)
    document = judge_file(path, config).document
    assert document["status"] != "error", document["error"]
    return {**reduce(document), "run": document["run"], "instrument": document["instrument"]}


@pytest.mark.parametrize("export", sorted(EXPORTS))
def test_export_gives_the_verdict_of_its_native_twin(export: str) -> None:
    """Read through its format, the export gives its native twin's findings and results."""
    config_name, native, native_config = EXPORTS[export]
    from_export = _judge(PROJECT / "fixtures" / "exports" / export, config_name)
    from_native = _judge(PROJECT / "fixtures" / native, native_config)
    assert from_export == from_native


def test_exports_are_up_to_date_with_the_native_fixtures() -> None:
    """fixtures/exports/make_exports.py --check finds every export in step with its native file."""
    result = subprocess.run(
        [sys.executable, str(PROJECT / "fixtures" / "exports" / "make_exports.py"), "--check"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, result.stdout + result.stderr


def test_an_export_maps_retention_times_with_its_decimal_comma() -> None:
    """A layout maps an export's retention-time column, its decimal commas converted."""
    from calwarden.daemon.parsing.exports import export_table
    from calwarden.daemon.parsing.native import normalise
    from calwarden.daemon.settings.formats import ExportFormat

    fmt = ExportFormat.model_validate(
        {"decimal": ",", "delimiter": ";", "columns": {"retention_time": "RT (min)"}}
    )
    data = b"seq;sample_id;kind;analyte;response;RT (min)\n1;S-1;sample;Zn;10;6,21\n"
    table, _ = export_table(data, fmt)
    assert normalise(table).readings[0].retention_time == 6.21
