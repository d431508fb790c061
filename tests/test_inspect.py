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


#: An invented export: a two-line preamble, ';' between fields, kind codes of its own.
PREAMBLE_EXPORT = (
    "Instrument;X1\nOperator;R.T.\n\nPos.;Sample;Type;Element;Intensity\n"
    "1;B;BLK;Zn;10\n2;S1;STD;Zn;100\n3;Q;QQ;Zn;100\n4;Q;ZZ;Zn;100\n5;Q;QQ;Zn;90\n"
)


def _export_config(tmp_path: Path, seq: str, find: str = "Sample") -> Path:
    config = tmp_path / "layout.yaml"
    config.write_text(
        "format:\n  file_type: csv\n  header: {find: " + find + "}\n"
        "  columns: {seq: '" + seq + "', sample_id: Sample, kind: Type, analyte: Element, "
        "response: Intensity}\n"
        "  kinds: {codes: {BLK: blank, STD: blank}}\n",
        encoding="utf-8",
    )
    return config


def test_columns_not_found_show_the_raw_lines_and_a_header_guess(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A header.find that misses: the first lines numbered and escaped, line 4 guessed, keys."""
    path = tmp_path / "export.csv"
    path.write_text(PREAMBLE_EXPORT.replace("Operator", "Oper\tator"), encoding="utf-8")
    config = _export_config(tmp_path, "Pos.", find="Sample Name")
    assert main(["inspect", str(path), "--config", str(config)]) == 2
    out = capsys.readouterr().out
    assert "the first 9 lines as written (escaped):" in out
    assert "  1 | Instrument;X1\n" in out and "  2 | Oper\\x09ator;R.T.\n" in out
    assert "the header is probably line 4 (split by ';')" in out
    assert '    delimiter: ";"\n    header: {find: "Sample"}   # or skip_lines: 3\n' in out
    assert '      seq: "Pos."\n' in out and '      response: "Intensity"\n' in out


def test_every_unknown_kind_code_is_listed_at_once(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Two unknown codes on three rows: each row a problem, both codes listed with their lines."""
    path = tmp_path / "export.csv"
    path.write_text(PREAMBLE_EXPORT, encoding="utf-8")
    assert main(["inspect", str(path), "--config", str(_export_config(tmp_path, "Pos."))]) == 2
    out = capsys.readouterr().out
    assert "unknown kind codes (2), every one:\n  'QQ' on lines 7, 9\n  'ZZ' on line 8\n" in out
    assert 'map each under format.kinds.codes (e.g. "QQ": sample)' in out


def test_a_mapped_column_missing_its_dot_gets_a_did_you_mean(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """columns.seq: Pos against a header 'Pos.': inspect and check both ask "did you mean"."""
    path = tmp_path / "export.csv"
    path.write_text(PREAMBLE_EXPORT, encoding="utf-8")
    config = str(_export_config(tmp_path, "Pos"))
    assert main(["inspect", str(path), "--config", config]) == 2
    assert main(["check", str(path), "--config", config]) == 2
    meant = "the format expects column 'Pos' (for seq) (did you mean 'Pos.'?)"
    assert capsys.readouterr().out.count(meant) == 2  # inspect's line, then check's report


def test_a_native_column_written_otherwise_gets_a_did_you_mean_once(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A native file with 'Sample ID': one problem (not one per row) naming the likely column."""
    path = tmp_path / "run.csv"
    path.write_text(
        HEADER.replace("sample_id", "Sample ID") + "1,CAL-1,cal,Zn,1000,1\n2,CAL-2,cal,Zn,2000,2\n",
        encoding="utf-8",
    )
    assert main(["inspect", str(path)]) == 2
    out = capsys.readouterr().out
    assert "would be rejected (1 problem(s)" in out
    assert "required column 'sample_id' missing (did you mean 'Sample ID' for sample_id?)" in out
    assert '      sample_id: "Sample ID"\n' in out
