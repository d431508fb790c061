"""What to repeat beyond single samples: the verdict's `repeat` key in JSON, report and alert."""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

from calwarden.daemon.alerts.content import file_alert, text_body
from calwarden.daemon.outputs.report import render
from calwarden.daemon.outputs.verdict_json import verdict_to_json
from calwarden.daemon.parsing.native import decode_table, normalise
from calwarden.rules.criteria import build_criteria
from calwarden.rules.evaluate import evaluate
from calwarden.rules.verdict import Finding, Severity, status_of

BASE = (Path(__file__).parent / "cases" / "_base.csv").read_text(encoding="utf-8")


def _document(rows: str, criteria: dict[str, Any] | None = None) -> dict[str, Any]:
    text = BASE.rstrip("\n") + "\n" + rows
    run = normalise(decode_table(text.encode("utf-8")), run_name="repeat-test")
    verdict = evaluate(run, build_criteria({"defaults": criteria or {}}))
    return verdict_to_json(verdict, source_path="r.csv", sha256=None, criteria_sha256=None)


def test_a_failing_icv_asks_for_a_new_calibration() -> None:
    """An ICV out of limits gives a repeat entry for the analyte's calibration."""
    document = _document("9,S-1,sample,Zn,3100,,,,,,,µg/L\n10,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n")
    assert document["repeat"] == []
    failing = BASE.replace("8,ICV,icv,Zn,10110,10", "8,ICV,icv,Zn,8000,10")
    text = failing + "9,S-1,sample,Zn,3100,,,,,,,µg/L\n10,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n"
    run = normalise(decode_table(text.encode("utf-8")))
    document = verdict_to_json(
        evaluate(run, build_criteria({})), source_path="r.csv", sha256=None, criteria_sha256=None
    )
    assert [(e["what"], e["analyte"]) for e in document["repeat"]] == [("calibration", "Zn")]


def test_a_failing_calibration_asks_for_a_new_calibration() -> None:
    """A calibration criterion that fails (r² here) gives a repeat entry for the calibration."""
    document = _document(
        "9,S-1,sample,Zn,3100,,,,,,,µg/L\n10,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n",
        {"min_r_squared": 0.99999999},
    )
    assert [(e["what"], e["analyte"]) for e in document["repeat"]] == [("calibration", "Zn")]
    assert any("r²" in reason for reason in document["repeat"][0]["reasons"])


def test_a_failure_carried_to_samples_asks_for_no_repeat() -> None:
    """A failing CCB whose samples are on the re-run list needs nothing repeated."""
    document = _document(
        "9,CCB-1,ccb,Zn,1600,,,,,,,µg/L\n10,S-1,sample,Zn,3100,,,,,,,µg/L\n"
        "11,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n12,CCB-2,ccb,Zn,120,,,,,,,µg/L\n"
    )
    assert document["status"] == "fail"
    assert [e["seq"] for e in document["reruns"]] == [10]
    assert document["repeat"] == []
    consequence = next(f for f in document["findings"] if f["rule"] == "bracket.blank")
    assert consequence["causes"] == [{"seq": 9, "sample_id": "CCB-1"}]


def test_a_failure_with_no_sample_to_rerun_asks_for_the_run() -> None:
    """A failing CCB with no sample around it: the analyte's run is to be repeated."""
    document = _document("9,CCB-1,ccb,Zn,1600,,,,,,,µg/L\n10,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n")
    assert document["status"] == "fail"
    assert document["reruns"] == []
    assert [(e["what"], e["analyte"]) for e in document["repeat"]] == [("run", "Zn")]


def test_report_and_alert_list_what_to_repeat() -> None:
    """The report has a "To repeat" section and the fail alert's text names the repeat."""
    document = _document("9,CCB-1,ccb,Zn,1600,,,,,,,µg/L\n10,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n")
    report = render(document)
    assert "To repeat (1)" in report
    assert "run of Zn:" in report
    alert = file_alert(
        "fail",
        document,
        inbox="in",
        path="r.csv",
        version=1,
        evaluated_at="2026-12-02T08:00:00+00:00",
        verdict_path="v.json",
        report_path="r.txt",
        flagged_path=None,
    )
    assert "Repeat the run of Zn: CCB-1 Zn at" in text_body(alert)


def test_a_control_rejection_asks_for_the_run() -> None:
    """A failing control-chart finding added to a verdict adds a repeat entry for the run."""
    text = (
        BASE.rstrip("\n")
        + "\n9,S-1,sample,Zn,3100,,,,,,,µg/L\n10,CCV-1,ccv,Zn,10110,10,,,,,,µg/L\n"
    )
    verdict = evaluate(normalise(decode_table(text.encode("utf-8"))), build_criteria({}))
    rejection = Finding("control.1-3.5s", Severity.FAIL, "1-3.5s", analyte="Zn")
    findings = (*verdict.findings, rejection)
    judged = dataclasses.replace(verdict, findings=findings, status=status_of(findings))
    document = verdict_to_json(judged, source_path="r.csv", sha256=None, criteria_sha256=None)
    assert document["status"] == "fail"
    assert document["repeat"] == [{"what": "run", "analyte": "Zn", "reasons": ["1-3.5s"]}]


def test_a_run_cut_off_after_its_icv_fails_and_asks_for_the_run() -> None:
    """Missing required QC (no CCV) fails the run with a repeat entry naming the shortfall."""
    document = _document("")
    assert document["status"] == "fail"
    (entry,) = document["repeat"]
    assert (entry["what"], entry["analyte"]) == ("run", "Zn")
    assert "0 CCV(s)" in entry["reasons"][0]
