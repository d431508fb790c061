"""The human-readable report: what an analyst reads first."""

from __future__ import annotations

from pathlib import Path

from calwarden.daemon.outputs.files import flagged_csv
from calwarden.daemon.outputs.report import render
from calwarden.daemon.parsing.native import read_native
from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import load_config
from calwarden.rules.evaluate import evaluate

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


def _report(name: str, *, full: bool = True) -> str:
    return render(judge_file(FIXTURES / name, load_config(None)).document, full=full)


def test_report_carries_the_caution() -> None:
    """Every report ends with the caution that screening does not replace review."""
    assert "does not replace, the analyst's review" in _report("bwl-metals-pass.csv")


def test_error_report_gives_the_reason_and_no_tables() -> None:
    """A report on a broken file says why it could not be evaluated and shows no results."""
    text = _report("bwl-bad-missing-nominal.csv")
    assert "ERROR: line 15, column 'nominal'" in text
    assert "Results (" not in text


def test_full_report_shows_each_standard_read_back() -> None:
    """The full report lists every calibration standard with its back-calculated value."""
    text = _report("bwl-metals-pass.csv")
    assert "Calibration standards read back" in text
    assert text.count("CAL-1 ") >= 4  # one line per analyte


def test_summary_leaves_out_the_tables() -> None:
    """The terminal summary has the re-run list and findings but no result table."""
    text = _report("bwl-metals-fail.csv", full=False)
    assert "Samples to re-run" in text and "Findings by analyte" in text
    assert "Results (" not in text


def test_failed_ccv_is_reported_with_value_and_limit() -> None:
    """The failing CCV is reported in plain words with its recovery and its limit."""
    assert "CCV-2 Zn recovered 82.6 %, limit 90–110 %" in _report("bwl-metals-fail.csv")


def test_daemon_report_lists_control_series_and_pictures() -> None:
    """A verdict the daemon amended names the series the run joined and its pictures."""
    document = {
        **judge_file(FIXTURES / "bwl-metals-pass.csv", load_config(None)).document,
        "control_charts": [
            {
                "instrument": "BWL-ICPMS-2",
                "analyte": "Zn",
                "kind": "CCV",
                "level": "25 µg/L",
                "points": 24,
                "centre": 99.8,
                "sd": 1.6,
                "limits": "baseline",
            }
        ],
        "pictures": ["bwl-metals-pass.calibration-Zn.png"],
    }
    report = render(document)
    assert "BWL-ICPMS-2 CCV Zn 25 µg/L  24      99.8    1.6  baseline" in report
    assert "  bwl-metals-pass.calibration-Zn.png" in report


def test_report_shows_replicate_injections_as_one_result(tmp_path: Path) -> None:
    """A sample injected three times is one line of the replicate table: n, mean, u, %RSD."""
    base = (Path(__file__).parent / "cases" / "_base.csv").read_text(encoding="utf-8")
    run = tmp_path / "replicates.csv"
    run.write_text(
        base
        + "9,S-07,sample,Zn,12200,,,,,,,µg/L\n10,S-07,sample,Zn,12500,,,,,,,µg/L\n"
        + "11,S-07,sample,Zn,12000,,,,,,,µg/L\n12,CCV-1,ccv,Zn,10100,10,,,,,,µg/L\n",
        encoding="utf-8",
    )
    judgement = judge_file(run, load_config(None))
    (group,) = judgement.document["replicates"]
    assert group["seqs"] == [9, 10, 11] and group["injections"] == 3
    assert group["rsd_pct"] < 10
    report = render(judgement.document)
    assert "Replicate injections (1)" in report
    line = next(row for row in report.splitlines() if row.startswith("S-07 "))
    assert f"{group['rsd_pct']:.1f}" in line and " 3 " in line


def _below_limit_run(tmp_path: Path) -> Path:
    """The rule cases' Zn run with S-1 at 1.5 µg/L diluted 10× (15 µg/L) under an RL of 2 (20)."""
    base = (Path(__file__).parent / "cases" / "_base.csv").read_text(encoding="utf-8")
    header, *rows = base.splitlines()
    run = tmp_path / "limits.csv"
    lines = [f"{header},reporting_limit", *(f"{row}," for row in rows)]
    lines += ["9,S-1,sample,Zn,1600,,10,,,,,µg/L,2", "10,CCV-1,ccv,Zn,10100,10,,,,,,µg/L,"]
    run.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return run


def test_report_shows_a_result_below_the_reporting_limit_as_less_than_it(tmp_path: Path) -> None:
    """A result under its dilution-adjusted reporting limit reads "< 20" with its U qualifier."""
    document = judge_file(_below_limit_run(tmp_path), load_config(None)).document
    (result,) = [r for r in document["results"] if r["sample_id"] == "S-1"]
    assert result["reported_as"] == "< 20" and result["reporting_limit"] == 20.0
    assert result["qualifiers"] == ["U"]
    line = next(row for row in render(document).splitlines() if row.startswith("9 "))
    assert "< 20" in line and line.split()[-1] == "U"


def test_flagged_copy_carries_the_reporting_limit_and_qualifiers(tmp_path: Path) -> None:
    """The flagged copy's row of S-1 ends with "< 20", the limit 20.0 and the qualifier U."""
    parsed = read_native(_below_limit_run(tmp_path))
    text = flagged_csv(parsed.table, evaluate(parsed.run, load_config(None).criteria)).decode()
    row = next(line for line in text.splitlines() if line.startswith("9,S-1,"))
    assert row.endswith(",< 20,20.0,U")
