"""The demo week (fixtures/demo/): each run gets its intended verdict through the real pipeline,
and the committed files are what fixtures/demo/make_demo.py writes."""

from __future__ import annotations

import functools
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import AppConfig

PROJECT = Path(__file__).resolve().parent.parent
DEMO = PROJECT / "fixtures" / "demo"

#: file → intended status (fixtures/demo/README.md)
STATUS = {
    "bwl-demo-1130-metals.csv": "pass",
    "bwl-demo-1201-metals.csv": "pass",
    "bwl-demo-1202-metals.csv": "fail",
    "bwl-demo-1203-herbicides.csv": "pass",
    "bwl-demo-1204-metals.csv": "pass",
    "bwl-demo-1204-broken.csv": "error",
}
FAILING = "bwl-demo-1202-metals.csv"


@functools.cache
def _document(name: str) -> dict[str, Any]:
    # Judged once per file: several tests read the failing run's verdict.
    return judge_file(DEMO / name, AppConfig()).document


def _failures(name: str) -> list[dict[str, Any]]:
    return [f for f in _document(name)["findings"] if f["severity"] == "fail"]


@pytest.mark.parametrize("name", sorted(STATUS))
def test_demo_run_gets_its_intended_status(name: str) -> None:
    """Each demo run is judged pass, fail or error as fixtures/demo/README.md says."""
    document = _document(name)
    assert document["status"] == STATUS[name], document["error"] or document["findings"]


def test_failing_run_fails_only_for_the_intended_rules() -> None:
    """The 2 December run fails on check.recovery, bracket.reportable and range.over only."""
    rules = {(f["rule"], f["analyte"]) for f in _failures(FAILING)}
    assert rules == {("check.recovery", "Cu"), ("bracket.reportable", "Cu"), ("range.over", "Zn")}


def test_failing_run_has_ccv_2_cu_low() -> None:
    """CCV-2 Cu recovers below 90 % and is the only failing check standard."""
    (finding,) = [f for f in _failures(FAILING) if f["rule"] == "check.recovery"]
    assert finding["sample_id"] == "CCV-2"
    assert finding["value"] < 90.0


def test_failing_run_makes_cu_unreportable_between_ccv_1_and_ccv_3() -> None:
    """Cu is not reportable in BW-1202-05…13, the samples the failing CCV-2 brackets."""
    affected = {
        a["sample_id"]
        for f in _failures(FAILING)
        if f["rule"] == "bracket.reportable"
        for a in f["affected"]
    }
    assert affected == {f"BW-1202-{n:02d}" for n in range(5, 14)}


def test_failing_run_suggests_a_dilution_for_the_over_range_sample() -> None:
    """BW-1202-03 Zn is over range and is put on the re-run list with a suggested dilution."""
    (finding,) = [f for f in _failures(FAILING) if f["rule"] == "range.over"]
    assert finding["sample_id"] == "BW-1202-03"
    assert finding["value"] > 50.0
    (rerun,) = [r for r in _document(FAILING)["reruns"] if r["sample_id"] == "BW-1202-03"]
    assert rerun["suggested_dilution"] == 2.0


def test_broken_export_error_names_the_cut_off_line() -> None:
    """The cut-off export's error names its last, short line."""
    assert _document("bwl-demo-1204-broken.csv")["error"].startswith("line 126: expected 15 fields")


def test_demo_files_are_up_to_date() -> None:
    """fixtures/demo/make_demo.py --check finds every committed demo file byte-identical."""
    result = subprocess.run(
        [sys.executable, str(DEMO / "make_demo.py"), "--check"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, result.stdout + result.stderr
