"""`calwarden inspect`: how a file is read, and every row that would be rejected."""

from __future__ import annotations

from pathlib import Path

import pytest

from calwarden.daemon.cli.main import main

PROJECT = Path(__file__).resolve().parent.parent
EXPORT = PROJECT / "fixtures" / "exports" / "bwl-icpms-metals-pass.txt"
EXPORT_CONFIG = PROJECT / "config" / "export-icpms-semicolon.yaml"
HEADER = "seq,sample_id,kind,analyte,response,nominal\n"


def test_inspect_shows_what_was_detected(capsys: pytest.CaptureFixture[str]) -> None:
    """inspect names the encoding, delimiter, header line and the column behind each field."""
    assert main(["inspect", str(EXPORT), "--config", str(EXPORT_CONFIG)]) == 0
    out = capsys.readouterr().out
    assert "encoding utf-16-le (BOM), delimiter ';', header on line 8" in out
    assert "response       <- 'Intensity (cps)'" in out
    assert "lines 1–7: preamble" in out
    assert "readings: 152 in 38 injections, 4 analytes (Zn, Cu, Pb, Cd)" in out


def test_inspect_lists_every_rejected_row(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """inspect reports each bad row with its line, not only the first, and exits 2."""
    path = tmp_path / "run.csv"
    path.write_text(
        HEADER
        + "1,CAL-1,cal,Zn,1000,1\n2,CAL-2,cal,Zn,abc,2\n3,S-1,smple,Zn,1500,\n4,S-2,sample,Zn,9,\n",
        encoding="utf-8",
    )
    assert main(["inspect", str(path)]) == 2
    out = capsys.readouterr().out
    assert "would be rejected (2 problem(s)" in out
    assert "line 3, column 'response'" in out
    assert "line 4, column 'kind'" in out


def test_inspect_reports_a_format_that_does_not_fit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A file the configured format cannot read is reported as such, with exit 2."""
    path = tmp_path / "run.csv"
    path.write_text(HEADER + "1,CAL-1,cal,Zn,1000,1\n", encoding="utf-8")
    assert main(["inspect", str(path), "--config", str(EXPORT_CONFIG)]) == 2
    assert "cannot be read: no header line with a column 'Sample Name'" in capsys.readouterr().out


def test_inspect_of_a_native_file_needs_no_configuration(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """A native file inspects cleanly with no configuration at all."""
    assert main(["inspect", str(PROJECT / "fixtures" / "bwl-metals-pass.csv")]) == 0
    assert "problems: none" in capsys.readouterr().out


def test_inspect_without_a_format_reads_as_check_does(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With no format configured, a semicolon file is refused by inspect as check refuses it."""
    path = tmp_path / "run.csv"
    path.write_text(HEADER.replace(",", ";") + "1;CAL-1;cal;Zn;1000;1\n", encoding="utf-8")
    assert main(["inspect", str(path)]) == 2
    assert main(["check", str(path)]) == 2
    assert "required columns" in capsys.readouterr().out
